"""The fixed-step kinematic engine (the readable, step-by-step reference).

One call of :meth:`Simulator.step` does, for the step from t_k to t_k + dt:

1. twist commands are turned into wheel commands by the inverse kinematics
   (steered wheels pick the nearer of an angle and its opposite within their
   limits; the twist is projected onto what the fixed wheels allow and
   scaled down to respect ``max_spin``);
2. steer actuators move toward their commands at ``max_steer_rate`` within
   ``steer_limits``;
3. the alignment policy (``wait`` / ``cosine`` / ``none``) shapes the spin
   commands while steered wheels are still turning;
4. spin actuators move toward their commands within ``max_spin_accel`` and
   ``max_spin``;
5. the body twist is the least-squares solution of the rolling rows of the
   driven wheels and the no-sliding rows of fixed and steered wheels; the row
   residuals are the slip;
6. passive wheels follow: undriven wheels roll freely, castors swivel
   (exactly, :mod:`sim.castor`), and the pose advances by the exact SE(2)
   exponential of the twist.

The returned :class:`StepResult` is row k of the trace: the state at t_k and
the motion applied from t_k on.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from sim.theory.castor import swivel
from sim.theory.constraints import contact_velocity, rolling_rows
from sim.theory.kinematics import forward, inverse
from sim.model.robot import Robot
from sim.theory.se2 import step_pose

ALIGN_POLICIES = ("wait", "cosine", "none")
DEFAULT_ALIGN_TOLERANCE = math.radians(2.0)
ICR_OMEGA_MIN = 1e-9  # rad/s: below this the motion counts as pure translation (no ICR)


def step_times(k, dt: float):
    """Time (s) of step ``k`` (int or int array).

    ``k / rate`` when the step is 1/rate for a whole rate (0.01 s, 1 ms, ...),
    so times are the nearest doubles to their decimals (0.35, not
    0.35000000000000003); ``k * dt`` otherwise.
    """
    rate = round(1.0 / dt)
    if rate >= 1 and abs(1.0 / dt - rate) <= 1e-9 * rate:
        return k / rate
    return k * dt


@dataclass(frozen=True)
class StepResult:
    """Row k of a run.  Shapes: pose, twist (3,); per-wheel arrays (n,).

    t : s.  pose : world (x, y, theta), theta continuous.  twist : body
    (vx, vy, omega).  icr : world (x, y) or (nan, nan).  slip : m/s, RSS of
    all residuals.  cmd_twist : (3,) or None when commanding wheels.
    spin_cmd, spin : rad/s (spin_cmd nan for undriven).  steer_cmd, steer :
    rad, body-frame heading (steer_cmd nan for castors).  slip_long,
    slip_lat : m/s (nan where the wheel has no such row).  angle : rad,
    cumulative wheel rotation at t_k.  shortfall : (3,) requested minus
    admissible twist.  rank : rank of the stacked rows.
    """

    t: float
    pose: np.ndarray
    twist: np.ndarray
    icr: np.ndarray
    slip: float
    cmd_twist: np.ndarray | None
    spin_cmd: np.ndarray
    spin: np.ndarray
    steer_cmd: np.ndarray
    steer: np.ndarray
    slip_long: np.ndarray
    slip_lat: np.ndarray
    angle: np.ndarray
    shortfall: np.ndarray
    rank: int


class Simulator:
    """A base in the plane, advanced one fixed step at a time.

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

    Commands persist between calls: pass ``twist=`` (body twist) or
    ``wheels={name: spin}`` / ``{name: {"spin": .., "steer": ..}}``.
    """

    def __init__(self, robot: Robot, step: float, start=(0.0, 0.0, 0.0),
                 align: str = "wait", align_tolerance: float = DEFAULT_ALIGN_TOLERANCE):
        if not step > 0 or not math.isfinite(step):
            raise ValueError(f"step must be a finite number > 0 s, got {step}")
        if align not in ALIGN_POLICIES:
            raise ValueError(f"align must be one of {ALIGN_POLICIES}, got {align!r}")
        self.robot = robot
        self.dt = float(step)
        self.align = align
        self.align_tolerance = float(align_tolerance)
        a = robot.arrays
        n = len(robot.wheels)
        self.k = 0
        self.pose = np.array(start, dtype=float)
        self.heading = a.heading.copy()
        self.spin = np.zeros(n)
        self.angle = np.zeros(n)
        self.spin_cmd = np.zeros(n)
        self.steer_cmd = a.heading.copy()
        self.twist_cmd = None
        self._driven = a.driven
        self._steered = a.is_("steered")
        self._castor = a.is_("castor")
        self._standard = a.is_("fixed", "steered")

    @property
    def t(self) -> float:
        return step_times(self.k, self.dt)

    # -- commands --------------------------------------------------------
    def command_twist(self, twist) -> None:
        """Hold body twist (vx, vy, omega) from now on (m/s, m/s, rad/s)."""
        tw = np.asarray(twist, dtype=float).reshape(3)
        if not np.all(np.isfinite(tw)):
            raise ValueError(f"twist must be finite, got {tw}")
        self.twist_cmd = tw

    def command_wheels(self, wheels: dict) -> None:
        """Set spin (rad/s) and/or steer (rad) commands by wheel name; others keep theirs."""
        if self.twist_cmd is not None:
            self.twist_cmd = None
        for name, cmd in wheels.items():
            i = self.robot.index[name]
            if not isinstance(cmd, dict):
                cmd = {"spin": cmd}
            if "spin" in cmd:
                if not self._driven[i]:
                    raise ValueError(f"wheel {name} is not driven; it cannot take a spin command")
                self.spin_cmd[i] = float(cmd["spin"])
            if "steer" in cmd:
                if not self._steered[i]:
                    raise ValueError(f"wheel {name} is not steered; it cannot take a steer command")
                self.steer_cmd[i] = float(cmd["steer"])

    def stop(self) -> None:
        """All spin commands to 0, steer angles held where they are."""
        self.twist_cmd = None
        self.spin_cmd[:] = 0.0
        self.steer_cmd[self._steered] = self.heading[self._steered]

    # -- one step ----------------------------------------------------------
    def step(self, twist=None, wheels=None) -> StepResult:
        """Advance one step; optional new commands first.  Returns row k."""
        if twist is not None:
            self.command_twist(twist)
        if wheels is not None:
            self.command_wheels(wheels)
        robot, a, dt = self.robot, self.robot.arrays, self.dt
        shortfall = np.zeros(3)
        cmd_twist = None
        # 1. inverse kinematics for twist commands
        if self.twist_cmd is not None:
            cmd_twist = self.twist_cmd
            ik = inverse(robot, self.twist_cmd, self.heading)
            self.steer_cmd[self._steered] = ik.steer[self._steered]
            spin_target = ik.spin
            shortfall = ik.shortfall
        else:
            spin_target = self.spin_cmd
        # 2. steer actuators
        st = self._steered
        goal = np.clip(self.steer_cmd[st], a.steer_lo[st], a.steer_hi[st])
        reach = a.max_steer_rate[st] * dt
        self.heading[st] = self.heading[st] + np.clip(goal - self.heading[st], -reach, reach)
        # 3. alignment policy
        if self.twist_cmd is not None:
            # steering error toward the reachable goal (clamped to steer_limits):
            # a wheel held at its limit is no longer turning, so it drives (and slips)
            err = goal - self.heading[st]
            if self.align == "wait" and np.any(np.abs(err) > self.align_tolerance):
                spin_target = np.zeros_like(spin_target)
            elif self.align == "cosine":
                spin_target = spin_target.copy()
                spin_target[st] *= np.maximum(np.cos(err), 0.0)
            self.spin_cmd = np.where(self._driven, spin_target, 0.0)
        # 4. spin actuators (driven wheels).  Under a twist command all wheels
        #    ramp together (the largest change sets the pace) so that the wheel
        #    speeds stay consistent; wheel commands ramp each wheel on its own.
        d = self._driven
        dv = a.max_spin_accel[d] * dt
        change = self.spin_cmd[d] - self.spin[d]
        if self.twist_cmd is not None:
            need = np.abs(change) / dv
            worst = float(np.max(need)) if need.size else 0.0
            change = change / worst if worst > 1.0 else change
        else:
            change = np.clip(change, -dv, dv)
        self.spin[d] = np.clip(self.spin[d] + change, -a.max_spin[d], a.max_spin[d])
        # 5. body twist by least squares, slip residuals
        fw = forward(robot, self.heading, self.spin)
        xi = fw.twist
        n = len(robot.wheels)
        slip_long = np.full(n, np.nan)
        slip_lat = np.full(n, np.nan)
        slip_long[fw.wheel[fw.rolling]] = fw.residual[fw.rolling]
        slip_lat[fw.wheel[~fw.rolling]] = fw.residual[~fw.rolling]
        # 6. passive wheels roll freely
        passive = ~d & ~a.is_("ball")
        if np.any(passive):
            r = rolling_rows(a.x[passive], a.y[passive], self.heading[passive], a.roller[passive])
            self.spin[passive] = (r @ xi) / (a.radius[passive] * np.cos(a.roller[passive]))
        ball = a.is_("ball")
        if np.any(ball):
            v = contact_velocity(a.x[ball], a.y[ball], xi)
            self.spin[ball] = np.hypot(v[:, 0], v[:, 1]) / a.radius[ball]
        if abs(xi[2]) > ICR_OMEGA_MIN:
            px, py = -xi[1] / xi[2], xi[0] / xi[2]
            c, s = math.cos(self.pose[2]), math.sin(self.pose[2])
            icr = np.array([self.pose[0] + c * px - s * py, self.pose[1] + s * px + c * py])
        else:
            icr = np.array([np.nan, np.nan])
        steer_cmd = np.where(self._castor, np.nan, np.where(st, self.steer_cmd, self.heading))
        row = StepResult(
            t=self.t, pose=self.pose.copy(), twist=xi, icr=icr, slip=fw.slip,
            cmd_twist=None if cmd_twist is None else cmd_twist.copy(),
            spin_cmd=np.where(d, self.spin_cmd, np.nan), spin=self.spin.copy(),
            steer_cmd=steer_cmd, steer=self.heading.copy(), slip_long=slip_long,
            slip_lat=slip_lat, angle=self.angle.copy(), shortfall=shortfall, rank=fw.rank)
        # advance to t_{k+1}
        self.pose = step_pose(self.pose, xi, dt)
        cs = self._castor
        if np.any(cs):
            self.heading[cs] = swivel(self.heading[cs], a.x[cs], a.y[cs], a.trail[cs], xi, dt)
        self.angle = self.angle + self.spin * dt
        self.k += 1
        return row
