"""The simulator: a base in the plane, advanced by the compiled step (:mod:`sim.engine.step`).

:class:`Simulator` owns the state arrays and the commands; :meth:`Simulator.step`
runs one step, :meth:`Simulator.advance` a stretch of many under the commands
in force, both through the same compiled kernel.  What a row holds, and when,
is :mod:`sim.engine.record`.
"""
from __future__ import annotations

import math

import numpy as np

from sim.engine import step as K
from sim.engine.record import Block, StepResult, width
from sim.model.robot import P_CODE, P_DRIVEN, STEERED, Robot
from sim.theory.kinematics import admissible_into, twist_scale

ALIGN_POLICIES = tuple(K.ALIGN_CODES)
DEFAULT_ALIGN_TOLERANCE = math.radians(2.0)
ICR_OMEGA_MIN = K.ICR_OMEGA_MIN


def step_times(k, dt: float):
    """Time (s) of step ``k`` (int or int array).

    ``k / rate`` when the step is 1/rate for a whole rate (0.01 s, 1 ms, ...),
    so times are the nearest doubles to their decimals (0.35, not
    0.35000000000000003); ``k * dt`` otherwise.
    """
    rate = _whole_rate(dt)
    return k / rate if rate else k * dt


def _whole_rate(dt: float) -> float:
    rate = round(1.0 / dt)
    return float(rate) if rate >= 1 and abs(1.0 / dt - rate) <= 1e-9 * rate else 0.0


class Timed:
    """Commands given ahead (:meth:`Simulator.timed`): ``steps`` (R,) int, ``twist`` bool,
    ``which``/``wheel`` (C,) int (wheel logs), ``values`` (R, 3 or C), and ``next``, the
    first row not yet applied."""

    def __init__(self, steps, twist, which, wheel, values):
        self.steps, self.twist, self.which, self.wheel, self.values = steps, twist, which, wheel, values
        self.next = 0


class Simulator:
    """A base in the plane, advanced one fixed step at a time or many at once.

    Parameters
    ----------
    robot : Robot
    step : float
        s, > 0.
    start : (x, y, theta)
        World pose at t = 0 (m, m, rad).
    align : str
        ``wait`` | ``cosine`` | ``none``, what drives do while steered
        wheels are still turning under a twist command.
    align_tolerance : float
        rad, steering error below which ``wait`` lets the wheels drive.
    skid : bool
        Under a twist command a base without steered wheels that cannot follow
        the twist without sliding (skid steer) gets the wheel speeds whose
        least-squares motion is the twist, and slips; False projects the twist
        onto what its fixed wheels allow instead.

    Commands persist between calls: pass ``twist=`` (body twist) or
    ``wheels={name: spin}`` / ``{name: {"spin": .., "steer": ..}}``.
    """

    def __init__(self, robot: Robot, step: float, start=(0.0, 0.0, 0.0),
                 align: str = "wait", align_tolerance: float = DEFAULT_ALIGN_TOLERANCE, skid: bool = True):
        if not step > 0 or not math.isfinite(step):
            raise ValueError(f"step must be a finite number > 0 s, got {step}")
        if align not in ALIGN_POLICIES:
            raise ValueError(f"align must be one of {ALIGN_POLICIES}, got {align!r}")
        self.robot = robot
        self.dt = float(step)
        n = len(robot.wheels)
        self.n = n
        self.width = width(n)
        P = robot.packed
        self._P = P
        self._steered = P[P_CODE] == STEERED
        self._driven = P[P_DRIVEN] != 0.0
        S = np.zeros((K.NSTATE, n))
        S[K.HEAD] = robot.arrays.heading
        S[K.STEER_CMD] = robot.arrays.heading
        self._S = S
        g = np.zeros(K.NG)
        g[K.G_X:K.G_TH + 1] = np.asarray(start, dtype=float).reshape(3)
        g[K.G_DT] = self.dt
        g[K.G_RATE] = _whole_rate(self.dt)
        g[K.G_SCALE:K.G_SCALE + 3] = twist_scale(robot)
        N = np.zeros((3, 3))
        g[K.G_NK] = admissible_into(P, twist_scale(robot), N)
        g[K.G_N:K.G_N + 9] = N.reshape(9)
        g[K.G_SKID] = 1.0 if skid else 0.0
        self._g = g
        self._A = np.zeros((2 * n, 3))
        self._Pm = np.zeros((3, 2 * n))
        self._rows = np.zeros((2, 2 * n), dtype=np.int64)
        self._Wk = np.zeros((2 * n + 4, 3))
        self._args = (P, S, g, self._A, self._Pm, self._rows, self._Wk)
        self.align = align
        self.align_tolerance = float(align_tolerance)

    # -- settings and state ------------------------------------------------
    @property
    def align(self) -> str:
        return ALIGN_POLICIES[int(self._g[K.G_ALIGN])]

    @align.setter
    def align(self, value: str) -> None:
        if value not in ALIGN_POLICIES:
            raise ValueError(f"align must be one of {ALIGN_POLICIES}, got {value!r}")
        self._g[K.G_ALIGN] = K.ALIGN_CODES[value]

    @property
    def align_tolerance(self) -> float:
        return float(self._g[K.G_ALIGN_TOL])

    @align_tolerance.setter
    def align_tolerance(self, value: float) -> None:
        self._g[K.G_ALIGN_TOL] = float(value)

    @property
    def k(self) -> int:
        """Index of the next row."""
        return int(self._g[K.G_K])

    @property
    def t(self) -> float:
        """s, time of the next row."""
        return step_times(self.k, self.dt)

    @property
    def pose(self) -> np.ndarray:
        """World pose (x, y, theta) of the next row (a copy)."""
        return self._g[K.G_X:K.G_TH + 1].copy()

    @property
    def heading(self) -> np.ndarray:
        """Wheel headings (n,) rad of the next row (a copy)."""
        return self._S[K.HEAD].copy()

    @property
    def spin(self) -> np.ndarray:
        """Actuator spins (n,) rad/s of the next row (passive wheels: as last rolled; a copy)."""
        return self._S[K.SPIN].copy()

    @property
    def angle(self) -> np.ndarray:
        """Cumulative wheel rotations (n,) rad of the next row (a copy)."""
        return self._S[K.ANGLE].copy()

    @property
    def twist_cmd(self):
        """The requested body twist (3,), or None under wheel commands."""
        g = self._g
        return g[K.G_CMD:K.G_CMD + 3].copy() if g[K.G_MODE] == K.MODE_TWIST else None

    # -- commands --------------------------------------------------------
    def command_twist(self, twist) -> None:
        """Hold body twist (vx, vy, omega) from now on (m/s, m/s, rad/s)."""
        vx, vy, w = (float(v) for v in twist)
        if not (math.isfinite(vx) and math.isfinite(vy) and math.isfinite(w)):
            raise ValueError(f"twist must be finite, got {(vx, vy, w)}")
        K.set_twist(self._g, vx, vy, w)

    def command_wheels(self, wheels: dict) -> None:
        """Set spin (rad/s) and/or steer (rad) commands by wheel name; others keep theirs."""
        S, g = self._S, self._g
        updates = []
        for name, cmd in wheels.items():
            if not isinstance(cmd, dict):
                cmd = {"spin": cmd}
            for part in ("spin", "steer"):
                if part in cmd:
                    updates.append((*self._command_slot(name, part), float(cmd[part])))
        for row, i, v in updates:
            if not math.isfinite(v):
                raise ValueError(f"wheel commands must be finite, got {v}")
        K.set_wheels(S, g, np.array([u[0] for u in updates], dtype=np.int64),
                     np.array([u[1] for u in updates], dtype=np.int64), np.array([u[2] for u in updates], dtype=float))

    def timed(self, kind: str, columns, steps, values) -> "Timed":
        """Commands given ahead, for :meth:`advance_timed`: row i of ``values`` (R, C) takes
        effect at step ``steps[i]`` (R,) (increasing).  ``kind`` ``twist``: columns among
        vx, vy, omega (m/s, rad/s; a missing one is 0); ``wheels``: columns ``NAME.spin``
        (rad/s) / ``NAME.steer`` (rad) of driven / steered wheels.  Values must be finite."""
        values = np.ascontiguousarray(values, dtype=float)
        if not np.isfinite(values).all():
            raise ValueError("timed commands must be finite")
        steps = np.ascontiguousarray(steps, dtype=np.int64)
        if kind == "twist":
            full = np.zeros((len(values), 3))
            for c, name in enumerate(columns):
                full[:, ("vx", "vy", "omega").index(name)] = values[:, c]
            return Timed(steps, True, np.zeros(0, np.int64), np.zeros(0, np.int64), full)
        if kind != "wheels":
            raise ValueError(f"timed commands are twist or wheels, got {kind!r}")
        slots = []
        for c in columns:                      # NAME.spin / NAME.steer
            name, _, part = c.partition(".")
            slots.append(self._command_slot(name, part))
        return Timed(steps, False, np.array([r for r, _ in slots], np.int64), np.array([i for _, i in slots], np.int64),
                     values)

    def _command_slot(self, name: str, part: str) -> tuple:
        """(row of the state, wheel index) a ``spin`` or ``steer`` command of wheel ``name`` sets;
        ValueError when there is no such wheel or it cannot take that command."""
        if name not in self.robot.index:
            raise ValueError(f"no wheel named {name!r}; wheels: {', '.join(self.robot.index)}")
        i = self.robot.index[name]
        if part == "spin":
            if not self._driven[i]:
                raise ValueError(f"wheel {name} is not driven; it cannot take a spin command")
            return K.SPIN_CMD, i
        if part == "steer":
            if not self._steered[i]:
                raise ValueError(f"wheel {name} is not steered; it cannot take a steer command")
            return K.STEER_CMD, i
        raise ValueError(f"wheel {name}: a command is spin or steer, got {part!r}")

    def advance_timed(self, m: int, timed: "Timed", out: np.ndarray | None = None) -> Block:
        """Run ``m`` steps, applying the commands of ``timed`` as their steps come, in compiled
        code; returns the rows as a :class:`Block` (written into ``out`` (m, width) when given)."""
        k0 = self.k
        if out is None:
            out = np.empty((m, self.width))
        timed.next = K.run_timed(*self._args, out, timed.steps, timed.twist, timed.which, timed.wheel,
                                 timed.values, timed.next)
        return Block(k0, out, self.n)

    def command(self, kind: str, value=None) -> None:
        """A command by kind: ``twist`` (value (3,)), ``wheels`` (value {name: ...}) or ``stop``."""
        if kind == "twist":
            self.command_twist(value)
        elif kind == "wheels":
            self.command_wheels(value)
        elif kind == "stop":
            self.stop()
        else:
            raise ValueError(f"command kind must be twist, wheels or stop, got {kind!r}")

    def stop(self) -> None:
        """All spin commands to 0, steer angles held where they are."""
        S, g = self._S, self._g
        g[K.G_MODE] = K.MODE_WHEELS
        g[K.G_CMD:K.G_CMD + 3] = 0.0
        S[K.SPIN_CMD] = 0.0
        S[K.STEER_CMD, self._steered] = S[K.HEAD, self._steered]

    # -- stepping ----------------------------------------------------------
    def step(self, twist=None, wheels=None) -> StepResult:
        """Advance one step; optional new commands first.  Returns row k."""
        if twist is not None:
            self.command_twist(twist)
        if wheels is not None:
            self.command_wheels(wheels)
        out = np.empty((1, self.width))
        K.run_stretch(*self._args, out)
        return StepResult(out[0], self.n)

    def advance_tracking(self, m: int, track, out: np.ndarray, extra: np.ndarray) -> Block:
        """Run ``m`` steps under a tracking law, in compiled code (:func:`sim.engine.tracking.run_tracking`).

        ``track`` holds the law's inputs (``law``, ``lead``, ``t0``, ``arrays`` (plan_t,
        plan_pose, plan_speed, plan_hint, plan_index, path_xy), ``frame``, ``gains``,
        ``size``, ``steered``; see :class:`sim.runs.closedloop.Tracking`).  Rows go to
        ``out`` (m, width); the reference pose and path error to ``extra`` (m, 4).
        """
        from sim.engine.tracking import run_tracking
        k0 = self.k
        pt, pp, pv, ph, pi, pxy = track.arrays
        run_tracking(*self._args, out[:m], extra[:m], track.law, track.lead, track.t0, pt, pp, pv, ph, pi, pxy,
                     track.frame, track.gains, track.size, track.steered)
        return Block(k0, out[:m], self.n)

    def advance(self, m: int, out: np.ndarray | None = None) -> Block:
        """Run ``m`` steps under the commands in force; returns their rows as a :class:`Block`
        (written into ``out`` (m, width) when given)."""
        k0 = self.k
        if out is None:
            out = np.empty((m, self.width))
        K.run_stretch(*self._args, out)
        return Block(k0, out, self.n)
