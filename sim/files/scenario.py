"""Scenario files: a robot, a step, a duration, a command script and checks.

See README "Scenario file".  Loading validates everything up front, so a run
never fails half-way on bad input.  A scenario file is a regular file of at
most :data:`MAX_BYTES`; a longer script belongs in a command log
(:mod:`sim.files.commandlog`, read in blocks).  The robot, route and floor
files and the command log named in a scenario must be regular files too.
"""
from __future__ import annotations

import hashlib
import math
import os
import stat
from dataclasses import dataclass, replace

from sim.files import fields as F
from sim.engine.simulator import ALIGN_POLICIES, DEFAULT_ALIGN_TOLERANCE
from sim.errors import InputError, quote
from sim.files.commandlog import Command, CommandLog, read_command_log
from sim.files.reading import read_limited
from sim.files.robotfile import read_robot, robot_from_data
from sim.model.robot import Robot
from sim.files.yamlread import load_bytes

MAX_STEPS = 10 ** 9
MAX_BYTES = 256 * 1024
_KEYS = ("robot", "step", "duration", "start", "align", "align_tolerance", "skid", "script",
         "commands", "route", "controller", "checks", "odometry", "control_period", "observe_truth",
         "floor", "description")
CHECK_KINDS = ("pose", "slip_below", "slip_above", "wheel", "odometry_error_below", "arrive_within",
               "tracking_error_below", "clearance_above", "no_contact")


@dataclass(frozen=True)
class Check:
    """A pass/fail condition on a run.

    kind : ``pose`` (at, pose, tolerance), ``slip_below`` / ``slip_above``
    (threshold m/s, over the run or at ``at``), ``wheel`` (at, name, steer
    and/or spin with tolerances), ``odometry_error_below`` (position m, heading rad),
    ``arrive_within`` (time s, tolerance (position m, heading rad) or None: the route's),
    ``tracking_error_below`` (threshold m, after s), ``clearance_above`` (threshold m, over
    the run or at ``at``), ``no_contact`` (over the run or at ``at``; both need the scenario's
    ``floor``).
    end : the file said ``at: end`` (``at`` is then the duration; a run that a
    controller or client ends early checks its last row instead).
    """

    kind: str
    at: float | None
    params: dict
    line: int | None = None
    text: str = ""
    end: bool = False


@dataclass(frozen=True)
class Scenario:
    """A validated scenario.  ``steps`` = number of rows (t = 0 .. duration inclusive).

    ``scripted`` is False when the file has neither ``script`` nor ``commands``
    (a scenario for a controller or ``trundle serve``; ``script`` is then empty).  ``control_period``
    (s, a whole number of steps) is how often a controller is asked for a
    command; ``observe_truth`` lets the controller see the true pose.
    """

    robot: Robot
    step: float
    duration: float
    start: tuple
    align: str
    align_tolerance: float
    script: tuple
    checks: tuple
    source: str
    robot_hash: str
    scenario_hash: str
    odometry: object = None
    description: str = ""
    skid: bool = True
    warnings: tuple = ()
    route: object = None
    plan: object = None
    controller: tuple | None = None
    headroom: float = 0.0
    control_period: float | None = None
    observe_truth: bool = False
    scripted: bool = True
    floor: object = None

    @property
    def steps(self) -> int:
        return int(round(self.duration / self.step)) + 1

    @property
    def closed_loop(self) -> bool:
        """Whether a controller drives the base (a route, goto entries or world-frame twists)."""
        if self.route is not None:
            return True
        if isinstance(self.script, CommandLog):       # twist or wheel commands only
            return False
        return any(c.kind in ("goto", "world_twist") for c in self.script)

    @property
    def control_steps(self) -> int:
        """Steps per control period (1 when the file gives none)."""
        return 1 if self.control_period is None else int(round(self.control_period / self.step))


def _hash_bytes(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()[:16]


def load_scenario(path: str | os.PathLike) -> Scenario:
    """Read and validate a scenario file.  Raises :class:`InputError`."""
    source = os.fspath(path)
    raw = read_limited(source, MAX_BYTES, "scenario file")
    return scenario_from_data(load_bytes(raw, source), source, _hash_bytes(raw))


def scenario_from_data(data, source="<inline>", scen_hash="", base_dir=None) -> Scenario:
    """Validate parsed YAML into a :class:`Scenario`.  ``Scenario.warnings``: the
    plausibility warnings of its robot and of the scenario itself (``file:line: warning: ...``)."""
    where = F.Where(source, "", getattr(data, "line", 1) or 1, [])
    if data is None:
        raise where.error("empty scenario; expected a mapping with robot, step, duration, script")
    data = F.expect_map(data, where, "a scenario mapping")
    F.check_keys(data, _KEYS, where, required=("robot", "step", "duration"))
    at = lambda k: where.at(data, k)
    if base_dir is None:
        base_dir = os.getcwd() if source == "<inline>" else os.path.dirname(os.path.abspath(source))
    robot, robot_hash = _robot(data["robot"], at("robot"), base_dir)
    step = F.number(data["step"], at("step"), positive=True, unit="s")
    duration = F.number(data["duration"], at("duration"), nonnegative=True, unit="s")
    nsteps = duration / step
    if nsteps > MAX_STEPS:
        raise at("duration").error(f"duration/step means {nsteps:.3g} steps; at most {MAX_STEPS:.0e} are allowed")
    if abs(nsteps - round(nsteps)) > 1e-6 * max(1.0, nsteps):
        raise at("duration").error(f"duration {duration:g} s is not a whole number of steps of {step:g} s")
    start = (0.0, 0.0, 0.0)
    if "start" in data:
        sw = at("start")
        sm = F.expect_map(data["start"], sw, "a mapping {x, y, theta}")
        F.check_keys(sm, ("x", "y", "theta", "steer"), sw)
        start = (F.number(sm.get("x", 0.0), sw.at(sm, "x"), unit="m"),
                 F.number(sm.get("y", 0.0), sw.at(sm, "y"), unit="m"),
                 F.angle(sm.get("theta", 0.0), sw.at(sm, "theta")))
        if "steer" in sm:
            robot = _start_steer(robot, sm["steer"], sw.at(sm, "steer"))
    align = F.choice(data["align"], ALIGN_POLICIES, at("align")) if "align" in data else "wait"
    tol = DEFAULT_ALIGN_TOLERANCE
    if "align_tolerance" in data:
        tol = F.angle(data["align_tolerance"], at("align_tolerance"))
        if tol <= 0:
            raise at("align_tolerance").error("must be > 0")
    skid = F.boolean(data["skid"], at("skid")) if "skid" in data else True
    given = [k for k in ("script", "commands", "route") if k in data]
    if len(given) > 1:
        raise where.error(f"give either 'script' or 'commands' (a CSV command log) or 'route', not "
                          f"{' and '.join(repr(k) for k in given)}")
    route = plan = None
    controller, headroom = None, 0.0
    has_goto = "script" in data and isinstance(data["script"], list) and any(
        isinstance(e, dict) and "goto" in e for e in data["script"])
    if "controller" in data:
        if "route" not in data and not has_goto:
            raise at("controller").error("controller settings need a 'route' or 'goto' entries in the script")
        controller, headroom = _controller(data["controller"], at("controller"), robot)
    if "commands" in data:
        script = _commands_csv(data["commands"], at("commands"), base_dir, robot, duration)
    elif "script" in data:
        script = _script(data["script"], at("script"), robot)
    elif "route" in data:
        script = []
        route, plan, start = _route(data["route"], at("route"), base_dir, robot,
                                    start if "start" in data else None, headroom)
    else:
        script = []  # commands come from a controller or a client (checked when run)
    for c in () if isinstance(script, CommandLog) else script:  # a command log checks its own times
        if c.at > duration + 1e-12:
            raise InputError(where.source, c.line, f"command at t={c.at:g} s comes after the end of the run "
                             f"({duration:g} s); shorten the script or lengthen 'duration'")
    floor = _floor(data["floor"], at("floor"), base_dir) if "floor" in data else None
    checks = _checks(data.get("checks", []), at("checks"), robot, duration) if "checks" in data else ()
    for c in checks:
        if c.kind in ("arrive_within", "tracking_error_below") and route is None \
                and (isinstance(script, CommandLog) or not any(e.kind == "goto" for e in script)):
            raise InputError(where.source, c.line, f"{c.kind} needs a 'route' or 'goto' entries in the script")
        if c.kind in ("clearance_above", "no_contact") and floor is None:
            raise InputError(where.source, c.line, f"check '{c.kind}' needs a floor: add 'floor: FILE.geojson' "
                             "(or an inline mapping of walls and shelves) to the scenario")
    odometry = None
    if "odometry" in data:
        from sim.files.odometryfile import odometry_from_data  # optional feature, own module
        odometry = odometry_from_data(data["odometry"], at("odometry"), robot)
    desc = data.get("description", "")
    if not isinstance(desc, str):
        raise at("description").error("expected text")
    warnings = tuple(dict.fromkeys(robot.warnings + tuple(where.notes)))
    period = None
    if "control_period" in data:
        period = F.number(data["control_period"], at("control_period"), positive=True, unit="s")
        ratio = period / step
        if abs(ratio - round(ratio)) > 1e-6 * max(1.0, ratio) or round(ratio) < 1:
            raise at("control_period").error(f"{period:g} s is not a whole number of steps of {step:g} s")
    truth = F.boolean(data["observe_truth"], at("observe_truth")) if "observe_truth" in data else False
    script = script if isinstance(script, CommandLog) else tuple(script)
    return Scenario(robot, step, duration, start, align, tol, script, tuple(checks),
                    source, robot_hash, scen_hash, odometry, desc, skid, warnings, route, plan, controller,
                    headroom, period, truth, "script" in data or "commands" in data or "route" in data,
                    floor)


def _route(value, where, base_dir, robot, start, headroom):
    """(Route, Plan, start pose) for the scenario's ``route`` (a file or an inline mapping).

    The base starts at the route's start unless the scenario gives ``start``; a route the
    base cannot drive is refused here, with the planner's reason.
    """
    from sim.files.routefile import load_route, route_from_data
    from sim.theory.speedplan import plan_route

    if isinstance(value, str):
        path = value if os.path.isabs(value) else os.path.join(base_dir, value)
        _regular(value, path, where, "route file")
        route = load_route(os.path.relpath(path) if not os.path.isabs(value) else path)
    elif isinstance(value, dict):
        route = route_from_data(value, where.source, where)
    else:
        raise where.error(f"expected a route file path or an inline route mapping, got {F.describe(value)}")
    plan = plan_route(robot, route, start_heading=None if start is None else start[2], headroom=headroom)
    if not plan.feasible:
        line = route.lines[plan.waypoint] if plan.waypoint is not None and route.lines else where.line
        src = route.source if plan.waypoint is not None and route.lines else where.source
        raise InputError(src, line, f"{robot.name} cannot drive route '{route.name}': {plan.reason}")
    if start is None:
        start = tuple(float(v) for v in plan.start_pose)
    return route, plan, start


def _controller(value, where, robot):
    """(gains, headroom): gains as a tuple in the order of :data:`sim.engine.tracking.GAIN_NAMES`
    for the base's law; headroom the fraction of the actuator limits the plan leaves to feedback."""
    from sim.engine.tracking import DEFAULT_GAINS, GAIN_NAMES, GAIN_UNITS
    from sim.theory.speedplan import motion_of

    motion = motion_of(robot)
    if motion.law == "none":
        raise where.error(f"{robot.name} cannot follow routes: {motion.reason}")
    m = F.expect_map(value, where, "a mapping of gains")
    names = GAIN_NAMES[motion.law]
    F.check_keys(m, names + ("headroom",), where)
    gains = list(DEFAULT_GAINS[motion.law])
    for i, k in enumerate(names):
        if k in m:
            gains[i] = F.number(m[k], where.at(m, k), nonnegative=True, unit=GAIN_UNITS[k])
    headroom = 0.0
    if "headroom" in m:
        headroom = F.number(m["headroom"], where.at(m, "headroom"), minimum=0.0, maximum=0.5,
                            unit="fraction of max_spin, max_spin_accel and max_steer_rate")
    return tuple(gains), headroom


def _start_steer(robot, value, where):
    """The robot with other starting angles for its steered wheels and castors."""
    m = F.expect_map(value, where, "a mapping of wheel name to starting angle")
    wheels = list(robot.wheels)
    for name, v in m.items():
        w = where.at(m, name)
        if name not in robot.index:
            raise w.error(f"no wheel named {quote(name)}{F.suggest(name, robot.index)}")
        wheel = robot.wheel(name)
        if wheel.type not in ("steered", "castor"):
            raise w.error(f"wheel '{name}' is {wheel.type}; only steered wheels and castors have a starting angle")
        h = F.angle(v, w)
        lo, hi = wheel.steer_limits
        if not lo <= h <= hi:
            raise w.error("starting angle is outside the wheel's steer_limits")
        wheels[robot.index[name]] = replace(wheel, heading=h)
    return replace(robot, wheels=tuple(wheels))


def _regular(value, path, where, what) -> None:
    """InputError at the scenario's line unless ``path`` is an existing regular file."""
    try:
        st = os.stat(path)
    except (OSError, ValueError):
        st = None
    if st is None:
        raise where.error(f"{what} {quote(value)} not found (looked for {quote(os.path.normpath(path), 80)})")
    if not stat.S_ISREG(st.st_mode):
        raise where.error(f"{what} {quote(value)} is not a regular file (a folder, FIFO or device); "
                          "expected a file")


def _robot(value, where, base_dir):
    if isinstance(value, str):
        path = value if os.path.isabs(value) else os.path.join(base_dir, value)
        _regular(value, path, where, "robot file")
        robot, raw = read_robot(os.path.relpath(path) if not os.path.isabs(value) else path)
        return robot, _hash_bytes(raw)
    if isinstance(value, dict):
        robot = robot_from_data(value, where.source, where)
        return robot, _hash_bytes(repr(sorted(value.items())).encode())
    raise where.error(f"expected a robot file path or an inline robot mapping, got {F.describe(value)}")


def _floor(value, where, base_dir):
    """The scenario's floor: a GeoJSON / YAML floor file, or an inline mapping of features."""
    from sim.files.floorfile import floor_from_data, load_floor  # optional feature, own module
    if isinstance(value, str):
        path = value if os.path.isabs(value) else os.path.join(base_dir, value)
        _regular(value, path, where, "floor file")
        return load_floor(os.path.relpath(path) if not os.path.isabs(value) else path)
    if isinstance(value, dict):
        return floor_from_data(value, where)
    raise where.error("expected a floor file path (GeoJSON .geojson, or .yaml) or an inline mapping "
                      f"of feature name to {{line: ...}} or {{polygon: ...}}, got {F.describe(value)}")


def _time(value, where, what="at") -> float:
    return F.number(value, where, nonnegative=True, unit="s")


def _script(items, where, robot):
    items = F.expect_list(items, where, "a list of timed commands")
    out, last = [], -math.inf
    for i, item in enumerate(items):
        w = where.at(items, i)
        item = F.expect_map(item, w, "a command {at, twist | wheels | stop | goto}")
        F.check_keys(item, ("at", "twist", "wheels", "stop", "goto"), w, required=("at",))
        t = _time(item["at"], w.at(item, "at"))
        if t <= last:
            raise w.at(item, "at").error(f"'at' must increase down the script: {t:g} s follows {last:g} s")
        last = t
        kinds = [k for k in ("twist", "wheels", "stop", "goto") if k in item]
        if len(kinds) != 1:
            raise w.error("each entry needs exactly one of twist, wheels, stop, goto")
        kind = kinds[0]
        if kind == "twist":
            frame, tw = _twist(item["twist"], w.at(item, "twist"))
            out.append(Command(t, "world_twist" if frame == "world" else "twist", tw, w.line))
        elif kind == "goto":
            out.append(Command(t, "goto", _goto(item["goto"], w.at(item, "goto"), robot), w.line))
        elif kind == "wheels":
            out.append(Command(t, "wheels", _wheels(item["wheels"], w.at(item, "wheels"), robot), w.line))
        else:
            if F.boolean(item["stop"], w.at(item, "stop")) is not True:
                raise w.at(item, "stop").error("write 'stop: true' (or leave the entry out)")
            out.append(Command(t, "stop", None, w.line))
    return out


def _twist(value, where):
    """(frame, (vx, vy, omega)): frame ``body`` (default) or ``world``."""
    m = F.expect_map(value, where, "a twist {vx, vy, omega, frame}")
    F.check_keys(m, ("vx", "vy", "omega", "frame"), where)
    frame = F.choice(m["frame"], ("body", "world"), where.at(m, "frame")) if "frame" in m else "body"
    return frame, (F.number(m.get("vx", 0.0), where.at(m, "vx"), unit="m/s"),
                   F.number(m.get("vy", 0.0), where.at(m, "vy"), unit="m/s"),
                   F.angle(m.get("omega", 0.0), where.at(m, "omega"), rate=True))


def _goto(value, where, robot):
    """(x, y, theta or None): a goal pose in the world frame."""
    from sim.theory.speedplan import motion_of

    m = F.expect_map(value, where, "a goal {x, y, theta}")
    F.check_keys(m, ("x", "y", "theta"), where, required=("x", "y"))
    motion = motion_of(robot)
    if motion.kind == "none":
        raise where.error(f"{robot.name} cannot drive to a goal: {motion.reason}")
    return (F.number(m["x"], where.at(m, "x"), unit="m"), F.number(m["y"], where.at(m, "y"), unit="m"),
            F.angle(m["theta"], where.at(m, "theta")) if "theta" in m else None)


def _wheels(value, where, robot):
    m = F.expect_map(value, where, "a mapping of wheel name to spin or {spin, steer}")
    out = {}
    for name, cmd in m.items():
        w = where.at(m, name)
        if name not in robot.index:
            raise w.error(f"no wheel named {quote(name)}{F.suggest(name, robot.index)}; wheels: {', '.join(robot.index)}")
        wheel = robot.wheel(name)
        if isinstance(cmd, dict):
            F.check_keys(cmd, ("spin", "steer"), w)
            c = {}
            if "spin" in cmd:
                c["spin"] = F.number(cmd["spin"], w.at(cmd, "spin"), unit="rad/s")
            if "steer" in cmd:
                c["steer"] = F.angle(cmd["steer"], w.at(cmd, "steer"))
        else:
            c = {"spin": F.number(cmd, w, unit="rad/s")}
        if "spin" in c and not wheel.driven:
            raise w.error(f"wheel '{name}' is not driven ({wheel.type}); it takes no spin command")
        if "steer" in c and wheel.type != "steered":
            raise w.error(f"wheel '{name}' is {wheel.type}, not steered; it takes no steer command")
        out[name] = c
    return out


def _commands_csv(value, where, base_dir, robot, duration) -> CommandLog:
    """A command log (CSV or Parquet, see README "Scenario file") -> a :class:`CommandLog`."""
    if not isinstance(value, str):
        raise where.error("expected the path of a command log (CSV or Parquet)")
    path = value if os.path.isabs(value) else os.path.join(base_dir, value)
    src = os.path.relpath(path) if not os.path.isabs(value) else path
    _regular(value, path, where, "command log")
    return read_command_log(path, src, robot, duration)


def _check_time(item, w, duration):
    if "at" not in item:
        return None
    v = item["at"]
    if v == "end":
        return duration
    t = _time(v, w.at(item, "at"))
    if t > duration + 1e-12:
        raise w.at(item, "at").error(f"check time {t:g} s is after the end of the run ({duration:g} s)")
    return t


def _checks(items, where, robot, duration):
    items = F.expect_list(items, where, "a list of checks")
    out = []
    kinds = CHECK_KINDS
    for i, item in enumerate(items):
        w = where.at(items, i)
        item = F.expect_map(item, w, "a check mapping")
        present = [k for k in kinds if k in item]
        if len(present) != 1:
            raise w.error(f"each check needs exactly one of {', '.join(kinds)}")
        kind = present[0]
        if kind == "pose":
            F.check_keys(item, ("at", "pose", "tolerance"), w, required=("at", "tolerance"))
            t = _check_time(item, w, duration)
            pw = w.at(item, "pose")
            pm = F.expect_map(item["pose"], pw, "a pose {x, y, theta}")
            F.check_keys(pm, ("x", "y", "theta"), pw)
            if not pm:
                raise pw.error("give at least one of x, y, theta")
            pose = {}
            for k in ("x", "y"):
                if k in pm:
                    pose[k] = F.number(pm[k], pw.at(pm, k), unit="m")
            if "theta" in pm:
                pose["theta"] = F.angle(pm["theta"], pw.at(pm, "theta"))
            tol = _tolerance(item["tolerance"], w.at(item, "tolerance"), ("position", "heading"))
            out.append(Check("pose", t, {"pose": pose, "tolerance": tol}, w.line))
        elif kind in ("slip_below", "slip_above"):
            F.check_keys(item, (kind, "at"), w)
            thr = F.number(item[kind], w.at(item, kind), nonnegative=True, unit="m/s")
            out.append(Check(kind, _check_time(item, w, duration), {"threshold": thr}, w.line))
        elif kind == "clearance_above":
            F.check_keys(item, (kind, "at"), w)
            thr = F.number(item[kind], w.at(item, kind), nonnegative=True, unit="m")
            out.append(Check(kind, _check_time(item, w, duration), {"threshold": thr}, w.line))
        elif kind == "no_contact":
            F.check_keys(item, (kind, "at"), w)
            if F.boolean(item[kind], w.at(item, kind)) is not True:
                raise w.at(item, kind).error("write 'no_contact: true' (or leave the check out)")
            out.append(Check(kind, _check_time(item, w, duration), {}, w.line))
        elif kind == "wheel":
            F.check_keys(item, ("at", "wheel", "steer", "spin", "tolerance"), w, required=("at", "tolerance"))
            t = _check_time(item, w, duration)
            nm = item["wheel"]
            if nm not in robot.index:
                raise w.at(item, "wheel").error(f"no wheel named {F.describe(nm)}{F.suggest(nm, robot.index)}")
            p = {"wheel": nm}
            if "steer" in item:
                p["steer"] = F.angle(item["steer"], w.at(item, "steer"))
            if "spin" in item:
                p["spin"] = F.number(item["spin"], w.at(item, "spin"), unit="rad/s")
            if len(p) == 1:
                raise w.error("a wheel check needs steer and/or spin")
            p["tolerance"] = _tolerance(item["tolerance"], w.at(item, "tolerance"), ("steer", "spin"))
            out.append(Check("wheel", t, p, w.line))
        elif kind == "arrive_within":
            F.check_keys(item, (kind, "tolerance"), w)
            t = F.number(item[kind], w.at(item, kind), positive=True, unit="s")
            tol = None
            if "tolerance" in item:
                from sim.files.routefile import tolerance
                from sim.model.route import DEFAULT_TOLERANCE
                tol = tolerance(item["tolerance"], w.at(item, "tolerance"), DEFAULT_TOLERANCE)
            out.append(Check(kind, None, {"time": t, "tolerance": tol}, w.line))
        elif kind == "tracking_error_below":
            F.check_keys(item, (kind, "after"), w)
            thr = F.number(item[kind], w.at(item, kind), positive=True, unit="m")
            after = _time(item["after"], w.at(item, "after")) if "after" in item else 0.0
            out.append(Check(kind, None, {"threshold": thr, "after": after}, w.line))
        else:
            F.check_keys(item, (kind,), w)
            tol = _tolerance(item[kind], w.at(item, kind), ("position", "heading"))
            out.append(Check(kind, None, {"tolerance": tol}, w.line))
        if item.get("at") == "end":
            out[-1] = replace(out[-1], end=True)
    return out


def _tolerance(value, where, keys):
    m = F.expect_map(value, where, f"a tolerance mapping with {' and/or '.join(keys)}")
    F.check_keys(m, keys, where)
    if not m:
        raise where.error(f"give {' and/or '.join(keys)}")
    out = {}
    for k in m:
        if k in ("heading", "steer"):
            out[k] = F.angle(m[k], where.at(m, k))
            if out[k] < 0:
                raise where.at(m, k).error("must be >= 0")
        else:
            out[k] = F.number(m[k], where.at(m, k), nonnegative=True)
    return out
