"""Controllers in the loop: what a controller sees, what it may command, and the
step-by-step run that asks it.

A *controller* is any object with ``command(observation) -> command``
(:class:`Controller`).  :func:`sim.runs.runner.run_scenario` with
``controller=obj`` (``trundle run SCEN --controller package.module:Name``) asks
it every control period (the scenario's ``control_period``, default every
step) and holds its answer until the next period.  ``trundle serve``
(:mod:`sim.runs.serve`) drives the same loop from a client over TCP.

The :class:`Observation` at time t_k is what a real controller could read at
that instant: each measured wheel's encoder count (through the scenario's
odometry model, :class:`sim.odometry.encoders.Odometer`, when it has an
``odometry`` section; otherwise the exact counts of every wheel with an
``encoder``), the steering readings of steered wheels and castors (rounded to
their ``steer_resolution``), and the true pose only when the scenario says
``observe_truth: true``.

A command is a body twist ``(vx, vy, omega)`` (m/s, m/s, rad/s), a mapping of
wheel commands ``{name: spin}`` or ``{name: {"spin": rad/s, "steer": rad}}``
(other wheels keep theirs), or ``None`` (keep the last command).

The run itself (:func:`controlled_blocks`) runs each decision's stretch of
steps through the engine (:meth:`sim.engine.simulator.Simulator.advance`) and
yields the rows in blocks, like the runner's scripted source, so the trace,
the summary and the checks are the runner's.  Who decides is a *driver*
(:class:`PeriodDriver` for a Python controller; the server's drivers in
:mod:`sim.runs.serve`): ``driver.decide(k, left, sensors)`` returns a
:class:`Decision` (a command to apply at row k and for how many steps) or
``None`` to end the run, which then ends with row k (the state at t_k, the last
command held).
"""
from __future__ import annotations

import abc
import importlib
import math
import os
import sys
from dataclasses import dataclass
from typing import NamedTuple, Protocol, runtime_checkable

import numpy as np

from sim.engine.record import Block
from sim.engine.simulator import Simulator
from sim.errors import InputError
from sim.files.scenario import Command
from sim.odometry.encoders import Odometer, OdometrySpec, steer_reading

# Sanity bounds on commands (not speed limits: the engine caps spins at max_spin).
MAX_SPEED = 100.0        # m/s, |vx| and |vy| of a twist
MAX_RATE = 100.0         # rad/s, |omega| of a twist
MAX_SPIN = 10_000.0      # rad/s, |spin| of a wheel command
MAX_STEER = 2 * math.pi  # rad, |steer| of a wheel command


@dataclass(frozen=True)
class Observation:
    """What the controller reads at time ``t`` (s), before choosing the motion from ``t`` on.

    counts : {wheel name: int}
        Cumulative encoder counts of the measured wheels (0 at the start when
        the wheel starts at angle 0), file order.
    steer : {wheel name: float}
        Steering readings (rad, body frame) of steered wheels and castors.
    pose : (x, y, theta) or None
        True world pose (m, m, rad) when the scenario has ``observe_truth: true``.
    """

    t: float
    counts: dict
    steer: dict
    pose: tuple | None = None


@runtime_checkable
class Controller(Protocol):
    """Anything with ``command(observation) -> command``.

    The command is a twist ``(vx, vy, omega)``, a mapping ``{wheel: spin |
    {"spin": .., "steer": ..}}``, or ``None`` to keep the last one.
    """

    def command(self, observation: Observation):
        ...


class CommandError(ValueError):
    """A command that cannot be applied; the message says what is allowed."""


def _number(value, what: str, bound: float, unit: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise CommandError(f"{what}: expected a number ({unit}), got {value!r}")
    try:
        v = float(value)
    except OverflowError:           # an integer beyond any float
        v = math.inf if value > 0 else -math.inf
    if math.isinf(v) and not isinstance(value, (float, np.floating)):
        raise CommandError(f"{what}: a number of {len(str(abs(value)))} digits is beyond the allowed "
                           f"+/-{bound:g} {unit}")
    if not math.isfinite(v):
        raise CommandError(f"{what}: expected a finite number ({unit}), got {value!r}")
    if abs(v) > bound:
        raise CommandError(f"{what}: {v:g} {unit} is beyond the allowed +/-{bound:g} {unit}")
    return v


def parse_twist(value) -> tuple:
    """``value``: a sequence of 3 numbers (vx m/s, vy m/s, omega rad/s).  Raises CommandError."""
    if isinstance(value, (str, bytes, dict)) or not hasattr(value, "__len__") or len(value) != 3:
        raise CommandError(f"twist: expected [vx, vy, omega] (m/s, m/s, rad/s), got {value!r}")
    vx, vy, w = value
    return (_number(vx, "twist vx", MAX_SPEED, "m/s"), _number(vy, "twist vy", MAX_SPEED, "m/s"),
            _number(w, "twist omega", MAX_RATE, "rad/s"))


def parse_wheels(value, robot) -> dict:
    """``value``: ``{name: spin}`` or ``{name: {"spin"?, "steer"?}}``.  Returns
    ``{name: {"spin"?: rad/s, "steer"?: rad}}``.  Raises CommandError."""
    if not isinstance(value, dict) or not value:
        raise CommandError(f"wheels: expected {{NAME: SPIN or {{\"spin\": .., \"steer\": ..}}}} with at least "
                           f"one wheel, got {value!r}")
    out = {}
    for name, cmd in value.items():
        if name not in robot.index:
            raise CommandError(f"wheels: no wheel named {name!r}; wheels: {', '.join(robot.index)}")
        wheel = robot.wheel(name)
        if isinstance(cmd, dict):
            extra = [k for k in cmd if k not in ("spin", "steer")]
            if extra or not cmd:
                raise CommandError(f"wheels.{name}: unknown key {extra[0]!r}; allowed: spin, steer" if extra
                                   else f"wheels.{name}: give spin and/or steer")
            c = {}
            if "spin" in cmd:
                c["spin"] = _number(cmd["spin"], f"wheels.{name}.spin", MAX_SPIN, "rad/s")
            if "steer" in cmd:
                c["steer"] = _number(cmd["steer"], f"wheels.{name}.steer", MAX_STEER, "rad")
        else:
            c = {"spin": _number(cmd, f"wheels.{name}", MAX_SPIN, "rad/s")}
        if "spin" in c and not wheel.driven:
            driven = [w.name for w in robot.wheels if w.driven]
            raise CommandError(f"wheels.{name}: {name} is not driven ({wheel.type}); it takes no spin; "
                               f"driven wheels: {', '.join(driven) or 'none'}")
        if "steer" in c and wheel.type != "steered":
            steered = [w.name for w in robot.wheels if w.type == "steered"]
            raise CommandError(f"wheels.{name}: {name} is {wheel.type}, not steered; it takes no steer; "
                               f"steered wheels: {', '.join(steered) or 'none'}")
        out[name] = c
    return out


def as_command(value, robot, t: float = 0.0) -> Command | None:
    """A controller's answer as a script :class:`~sim.files.scenario.Command` (None: hold)."""
    if value is None:
        return None
    if isinstance(value, dict):
        return Command(t, "wheels", parse_wheels(value, robot))
    return Command(t, "twist", parse_twist(value))


class Sensors:
    """Readings of a running base: :meth:`observe` gives the :class:`Observation` now.

    Parameters
    ----------
    scen : Scenario.  sim : its Simulator.
    odo : Odometer or None, the scenario's odometry model (also fed the rows).
    settle : callable or None, called before a reading that needs the
        odometer to have seen every row so far (random count errors).
    """

    def __init__(self, scen, sim: Simulator, odo: Odometer | None = None, settle=None):
        robot = scen.robot
        self.sim = sim
        self.truth = bool(scen.observe_truth)
        if odo is None:
            names = tuple(w.name for w in robot.wheels if w.encoder)
            odo = Odometer(OdometrySpec(wheels=names), robot, scen.step, scen.start) if names else None
        self.reader = odo
        self.settle = settle if odo is not None and odo.rng is not None else None
        self.measured = tuple(odo.spec.wheels) if odo is not None else ()
        self.encoders = {n: robot.wheel(n).encoder for n in self.measured}
        self.steer_idx = np.array([i for i, w in enumerate(robot.wheels) if w.type in ("steered", "castor")], int)
        self.steered = tuple(robot.wheels[i].name for i in self.steer_idx)
        self.steer_list = self.steer_idx.tolist()
        self.resolution = np.array([robot.wheels[i].steer_resolution or 0.0 for i in self.steer_idx])
        self.rounded = bool(np.any(self.resolution > 0))

    def readings(self) -> tuple:
        """The values of :meth:`observe` as plain lists, in the order of :attr:`measured`
        and :attr:`steered`: ``(counts, steer, pose or None)``.  Counts are whole
        numbers held as floats; the server formats its replies from these."""
        sim = self.sim
        if self.settle is not None:
            self.settle()
        counts = self.reader.reading_list(sim.angle) if self.reader is not None else []
        steer = []
        if self.rounded:
            steer = steer_reading(sim.heading[self.steer_idx], self.resolution).tolist()
        elif self.steered:
            heading = sim.heading.tolist()
            steer = [heading[i] for i in self.steer_list]
        pose = sim.pose.tolist() if self.truth else None
        return counts, steer, pose

    def observe(self) -> Observation:
        counts, steer, pose = self.readings()
        return Observation(self.sim.t, dict(zip(self.measured, map(int, counts))), dict(zip(self.steered, steer)),
                           tuple(pose) if pose is not None else None)


class Decision(NamedTuple):
    """Apply ``command`` (None: keep the current one) at row k and hold it for ``steps`` rows;
    ``extra`` gives the driver's own trace columns for those rows.  (A named tuple: one is
    made per decision, so it is kept cheap.)"""

    command: Command | None = None
    steps: int = 1
    extra: tuple = ()


class Driver(abc.ABC):
    """Decides a controlled run (see the module docstring): ``decide(k, left, sensors)``
    returns a :class:`Decision` for row ``k`` (``left`` more steps may follow it) or
    None to end the run with row k.  ``columns``: extra trace columns it fills."""

    columns = ()

    @abc.abstractmethod
    def decide(self, k: int, left: int, sensors: "Sensors") -> "Decision | None":
        """The decision for row ``k`` (every driver defines it)."""

    def final_extra(self) -> tuple:
        """Values of ``columns`` for the last row, after ``decide`` ended the run."""
        return (math.nan,) * len(self.columns)


class PeriodDriver(Driver):
    """Asks a Python controller every ``period`` steps."""

    def __init__(self, controller, scen, name: str | None = None):
        if not callable(getattr(controller, "command", None)):
            raise InputError(name or "controller", None, "has no command(observation) method")
        self.controller = controller
        self.robot = scen.robot
        self.period = scen.control_steps
        self.name = name or type(controller).__name__

    def decide(self, k: int, left: int, sensors: Sensors) -> Decision:
        obs = sensors.observe()
        value = self.controller.command(obs)
        try:
            cmd = as_command(value, self.robot, obs.t)
        except CommandError as exc:
            raise InputError(self.name, None, f"command() at t={obs.t:g} s: {exc}; a command is a twist "
                             "(vx, vy, omega), a mapping {wheel: spin or {spin, steer}}, or None") from None
        return Decision(cmd, self.period)


def controlled_blocks(scen, odo, driver, on_row=None, block_rows: int = 2048):
    """The rows of a run decided by ``driver``, as ``(Block, extra)`` pieces.

    Each decision's stretch runs as one compiled stretch
    (:meth:`~sim.engine.simulator.Simulator.advance`) into a buffer of
    ``block_rows`` rows that is handed on when full and at the end, so the
    trace writer and the summary take whole blocks however short the
    decisions are; each piece is consumed before the buffer is written again.
    A reading that needs the odometer up to date (random count errors) feeds
    it the rows made since the last one, in place.  ``extra`` (m, ncols) holds
    the odometry columns (when ``odo``) and then the driver's ``columns``, or
    is None when there are none.  The run ends at ``scen.steps`` rows or when
    the driver returns None.
    """
    sim = Simulator(scen.robot, scen.step, scen.start, scen.align, scen.align_tolerance, skid=scen.skid)
    ncols = len(driver.columns)
    n = scen.steps
    size = min(block_rows, max(n, 1))
    buf = np.empty((size, sim.width))
    ebuf = np.empty((size, ncols))
    obuf = np.empty((size, len(odo.columns))) if odo is not None else None
    fill, k0, odone = 0, 0, 0       # rows in buf; row index of buf[0]; rows the odometer has seen

    def settle():
        nonlocal odone
        if fill > odone:
            obuf[odone:fill] = odo.update_block(Block(k0 + odone, buf[odone:fill], sim.n))
            odone = fill

    def piece():
        nonlocal fill, k0, odone
        block = Block(k0, buf[:fill], sim.n)
        parts = []
        if odo is not None:
            settle()
            parts.append(obuf[:fill])
        if ncols:
            parts.append(ebuf[:fill])
        out = (block, np.hstack(parts) if parts else None)
        k0 += fill
        fill = odone = 0
        return out

    sensors = Sensors(scen, sim, odo, settle)
    command, advance = sim.command, sim.advance
    k = 0
    try:
        while k < n:
            d = driver.decide(k, n - 1 - k, sensors)
            if d is None:        # the driver ends the run: row k is the last
                n, d = k + 1, Decision(extra=driver.final_extra())
            cmd = d.command
            if cmd is not None:      # None keeps the current command
                command(cmd.kind, cmd.value)
            todo = max(1, min(int(d.steps), n - k))
            while todo:
                m = min(todo, size - fill)
                block = advance(m, out=buf[fill:fill + m])
                if ncols:
                    ebuf[fill:fill + m] = d.extra
                if on_row is not None:
                    for i in range(m):
                        on_row(block.row(i))
                fill += m
                k += m
                todo -= m
                if fill == size:
                    yield piece()
        if fill:
            yield piece()
    except KeyboardInterrupt:
        if fill:  # an interrupted run keeps the rows made so far
            yield piece()
        raise


def load_controller(spec: str):
    """The controller named ``package.module:Name`` on the command line.

    ``Name`` (dotted attributes allowed) is a class, created with no
    arguments, or an object with a ``command`` method.  The module is found on
    the Python path, the current folder first.  Nothing else is ever imported.
    """
    what = "--controller"
    mod_name, sep, attr = spec.partition(":")
    if not sep or not mod_name or not attr:
        raise InputError(what, None, f"expected package.module:Name (a Python module and the controller "
                                     f"class or object in it), got {spec!r}")
    if os.getcwd() not in sys.path and "" not in sys.path:
        sys.path.insert(0, os.getcwd())
    try:
        module = importlib.import_module(mod_name)
    except ModuleNotFoundError as exc:
        if exc.name and (mod_name == exc.name or mod_name.startswith(exc.name + ".")):
            raise InputError(what, None, f"no module named {exc.name!r} (looked in the current folder and "
                                         "on the Python path)") from None
        raise
    except SyntaxError as exc:
        raise InputError(exc.filename or mod_name, exc.lineno, f"syntax error: {exc.msg}") from None
    obj = module
    for part in attr.split("."):
        if not hasattr(obj, part):
            raise InputError(what, None, f"module {mod_name!r} has no {attr!r}")
        obj = getattr(obj, part)
    if isinstance(obj, type):
        try:
            obj = obj()
        except TypeError as exc:
            raise InputError(what, None, f"cannot create {attr}() without arguments: {exc}") from None
    if not callable(getattr(obj, "command", None)):
        raise InputError(what, None, f"{spec} has no command(observation) method")
    return obj
