"""Study files (README "Design studies"): which numbers of a base to vary, over what, and what to measure.

```yaml
robot: ../robots/quad-steer.yaml       # the base to start from (relative to this file)
seed: 7                                # optional, for samples (default 0)
parameters:
  - name: module_x                     # optional column name
    wheels: [front_left, front_right, rear_left, rear_right]   # or  wheel: front_left
    key: x                             # a number of the wheel (list below)
    mirror: true                       # optional: each wheel keeps the sign it has in the robot file
    range: {from: 0.30, to: 0.40, count: 3}
  - footprint: length                  # or a number of the footprint (length, width, x, y)
    values: [0.9, 1.0]
  - wheels: [front_left, front_right, rear_left, rear_right]
    key: max_steer_rate
    samples: 8                         # Latin hypercube over every sampled parameter
    range: {from: 2, to: 4}
routes:                                # each variant's time-optimal plan along these
  - ../routes/ward-corridor.yaml
  - {route: ../routes/other.yaml, floor: ../floors/ward.yaml}
scenarios:                             # each variant run through these, robot replaced
  - ../quad-steer-corridor.yaml
figures: [route_time, resteer_time, peak_slip, odometry_error, checks]
```

Everything is checked here, before anything runs; bad input raises
:class:`~sim.errors.InputError` ``file:line: message``.  A variant that the robot
file's own validation refuses is not an error of the study: it is that variant's status
(:mod:`sim.runs.study`).
"""
from __future__ import annotations

import hashlib
import math
import os
from dataclasses import dataclass

from sim.files import fields as F
from sim.files.robotfile import robot_from_data
from sim.files.yamlread import load_file

KEYS = ("description", "robot", "seed", "parameters", "routes", "scenarios", "figures")
PARAM_KEYS = ("name", "wheel", "wheels", "key", "mirror", "footprint", "values", "range", "samples")

# The numbers of a wheel a study may vary: key -> (wheel types it applies to, kind, unit).
# kind: "length" / "positive" / "rate" (plain numbers), "angle" (plain rad or '30 deg'),
# "turn_rate" (rad/s or '90 deg'), "limits" (a value v sets steer_limits to [-v, v]).
ALL = ("fixed", "steered", "castor", "swedish", "ball")
WHEEL_KEYS = {
    "x": (ALL, "length", "m"),
    "y": (ALL, "length", "m"),
    "heading": (ALL, "angle", "rad"),
    "radius": (ALL, "positive", "m"),
    "max_spin": (ALL, "positive", "rad/s"),
    "max_spin_accel": (ALL, "positive", "rad/s^2"),
    "max_steer_rate": (("steered",), "turn_rate", "rad/s"),
    "steer_limits": (("steered",), "limits", "rad"),
    "steer_resolution": (("steered", "castor"), "angle", "rad"),
    "trail": (("castor",), "positive", "m"),
    "roller": (("swedish",), "angle", "rad"),
}
FOOTPRINT_KEYS = {"length": "m", "width": "m", "x": "m", "y": "m"}

# figure -> (column, unit, better: "low" or "high", needs: "route" / "scenario" / "floor")
FIGURES = {
    "route_time": ("route_time", "s", "low", "route"),
    "resteer_time": ("resteer_time", "s", "low", "route"),
    "peak_slip": ("peak_slip", "m/s", "low", "scenario"),
    "smallest_clearance": ("smallest_clearance", "m", "high", "floor"),
    "odometry_error": ("odometry_error", "m", "low", "scenario"),
    "checks": ("checks_failed", "", "low", "scenario"),
}


@dataclass(frozen=True)
class Parameter:
    """One varied number.  ``target``: ``"wheels"`` or ``"footprint"``; ``wheels``: indexes
    into the robot file's wheel list; ``signs``: +1/-1 per wheel (``mirror``, else all +1).
    Exactly one of ``values`` (tuple, SI) and ``samples`` (N, drawn from ``low``..``high``)."""

    name: str
    target: str
    key: str
    wheels: tuple = ()
    signs: tuple = ()
    values: tuple | None = None
    samples: int | None = None
    low: float = math.nan
    high: float = math.nan
    line: int | None = None

    def overrides(self, value: float) -> list:
        """``(wheel index or None for the footprint, key, value)`` items for one value."""
        if self.target == "footprint":
            return [(None, self.key, float(value))]
        return [(i, self.key, float(s * value)) for i, s in zip(self.wheels, self.signs)]


@dataclass(frozen=True)
class RouteRun:
    path: str
    name: str
    floor: str | None = None


@dataclass(frozen=True)
class ScenarioRun:
    path: str
    name: str


@dataclass(frozen=True)
class Study:
    """A checked study.  Paths are as found (relative to the working folder or absolute)."""

    source: str
    robot_path: str
    parameters: tuple
    routes: tuple
    scenarios: tuple
    figures: tuple
    seed: int
    description: str
    digest: str        # sha256 of every input file's bytes and the figures (the cache key's base)

    def columns(self) -> list:
        """Figure columns, in the order of ``figures``, one per route/scenario when there are several."""
        out = []
        for f in self.figures:
            col, _, _, needs = FIGURES[f]
            runs = self.scenarios if needs == "scenario" else [
                r for r in self.routes if needs == "route" or r.floor]
            if len(runs) <= 1:
                out.append(col)
            else:
                out += [f"{col}@{r.name}" for r in runs]
        return out


def figure_of(column: str) -> tuple:
    """``(figure, unit, better)`` for a figure column (``route_time`` or ``route_time@NAME``)."""
    base = column.split("@", 1)[0]
    for f, (col, unit, better, _) in FIGURES.items():
        if col == base:
            return f, unit, better
    raise KeyError(column)


def load_study(path) -> Study:
    """Read and check a study file.  Raises :class:`InputError`."""
    source = os.fspath(path)
    return study_from_data(load_file(source), source)


def _file(value, where, base_dir, what) -> str:
    """The path of a file the study names: absolute when the study's own path or the value is,
    else relative to the working folder (as the user would type it)."""
    if not isinstance(value, str) or not value.strip():
        raise where.error(f"expected the path of a {what} file, got {F.describe(value)}")
    p = value if os.path.isabs(value) else os.path.normpath(os.path.join(base_dir, value))
    if not os.path.isfile(p):
        raise where.error(f"{what} file '{value}' not found (looked for {p})")
    return p if os.path.isabs(value) or os.path.isabs(where.source) else os.path.relpath(p)


def _digest_file(h, path) -> None:
    with open(path, "rb") as fh:
        data = fh.read()
    h.update(f"{len(data)}:".encode())
    h.update(data)


def referenced_files(scenario_path: str, data) -> list:
    """Files a scenario names (route, commands) that exist, for the cache key."""
    out = []
    base = os.path.dirname(os.path.abspath(scenario_path))
    if isinstance(data, dict):
        for k in ("route", "commands"):
            v = data.get(k)
            if isinstance(v, str):
                p = v if os.path.isabs(v) else os.path.join(base, v)
                if os.path.isfile(p):
                    out.append(p)
    return out


def study_from_data(data, source="<inline>") -> Study:
    where = F.Where(source, "", getattr(data, "line", 1) or 1)
    if data is None:
        raise where.error("empty study; expected a mapping with robot, parameters, routes and/or scenarios")
    m = F.expect_map(data, where, "a study mapping {robot, parameters, routes, scenarios, figures}")
    F.check_keys(m, KEYS, where, required=("robot", "parameters"))
    at = lambda k: where.at(m, k)
    base_dir = os.getcwd() if source == "<inline>" else os.path.dirname(os.path.abspath(source))
    robot_path = _file(m["robot"], at("robot"), base_dir, "robot")
    robot_data = load_file(robot_path)
    robot = robot_from_data(robot_data, robot_path)  # the base itself must be a valid robot
    desc = m.get("description", "")
    if not isinstance(desc, str):
        raise at("description").error("expected text")
    seed = 0
    if "seed" in m:
        s = m["seed"]
        if isinstance(s, bool) or not isinstance(s, int) or s < 0:
            raise at("seed").error(f"expected a whole number >= 0, got {F.describe(s)}")
        seed = s
    pw = at("parameters")
    items = F.expect_list(m["parameters"], pw, "a list of parameters")
    if not items:
        raise pw.error("a study needs at least one parameter")
    params, owners, names = [], {}, {}
    for i, item in enumerate(items):
        p = _parameter(item, pw.at(items, i), robot, robot_data)
        if p.name in names:
            raise pw.at(items, i).error(f"parameter name '{p.name}' is used twice (first on line {names[p.name]})")
        names[p.name] = p.line
        for w in (p.wheels if p.target == "wheels" else (None,)):
            k = (w, p.key)
            if k in owners:
                what = f"footprint {p.key}" if w is None else f"{robot.wheels[w].name}.{p.key}"
                raise pw.at(items, i).error(f"{what} is already varied by the parameter on line {owners[k]}")
            owners[k] = p.line
        params.append(p)
    sampled = [p for p in params if p.samples is not None]
    if len({p.samples for p in sampled}) > 1:
        raise pw.error("every sampled parameter must draw the same number of samples (one Latin hypercube), got "
                       + ", ".join(f"{p.name}: {p.samples}" for p in sampled))
    routes = []
    if "routes" in m:
        rw = at("routes")
        ritems = F.expect_list(m["routes"], rw, "a list of route files or {route, floor} mappings")
        for j, r in enumerate(ritems):
            w = rw.at(ritems, j)
            floor = None
            if isinstance(r, dict):
                F.check_keys(r, ("route", "floor"), w, required=("route",))
                path = _file(r["route"], w.at(r, "route"), base_dir, "route")
                if "floor" in r:
                    floor = _file(r["floor"], w.at(r, "floor"), base_dir, "floor")
                    from sim.files.floorfile import load_floor
                    load_floor(floor)  # a bad floor is the study's error, found before anything runs
            else:
                path = _file(r, w, base_dir, "route")
            routes.append(RouteRun(path, _stem(path), floor))
    scens = []
    if "scenarios" in m:
        sw = at("scenarios")
        sitems = F.expect_list(m["scenarios"], sw, "a list of scenario files")
        for j, s in enumerate(sitems):
            path = _file(s, sw.at(sitems, j), base_dir, "scenario")
            scens.append(ScenarioRun(path, _stem(path)))
    _unique_names(routes, at("routes"))
    _unique_names(scens, at("scenarios"))
    if not routes and not scens:
        raise where.error("a study needs 'routes' or 'scenarios' (or both) to run each variant on")
    if "figures" in m:
        fw = at("figures")
        fitems = F.expect_list(m["figures"], fw, "a list of figures")
        if not fitems:
            raise fw.error(f"give at least one figure: {', '.join(FIGURES)}")
        figures = []
        for j, f in enumerate(fitems):
            w = fw.at(fitems, j)
            f = F.choice(f, tuple(FIGURES), w)
            needs = FIGURES[f][3]
            if needs == "route" and not routes:
                raise w.error(f"{f} is measured on routes; the study has no 'routes'")
            if needs == "scenario" and not scens:
                raise w.error(f"{f} is measured in scenarios; the study has no 'scenarios'")
            if needs == "floor":
                if not any(r.floor for r in routes):
                    raise w.error("smallest_clearance needs a route with a floor: {route: FILE, floor: FILE}")
            if f in figures:
                raise w.error(f"figure '{f}' is listed twice")
            figures.append(f)
    else:
        figures = (["route_time", "resteer_time"] if routes else []) + (["peak_slip", "checks"] if scens else [])
    h = hashlib.sha256()
    h.update(b"trundle study 1\0")
    _digest_file(h, robot_path)
    for r in routes:
        _digest_file(h, r.path)
        h.update(b"floor\0")
        if r.floor:
            _digest_file(h, r.floor)
    for s in scens:
        _digest_file(h, s.path)
        for extra in referenced_files(s.path, load_file(s.path)):
            _digest_file(h, extra)
    h.update(repr(tuple(figures)).encode())
    return Study(source, robot_path, tuple(params), tuple(routes), tuple(scens), tuple(figures), seed,
                 desc, h.hexdigest())


def _stem(path) -> str:
    return os.path.splitext(os.path.basename(path))[0]


def _unique_names(runs, where) -> None:
    seen = set()
    for r in runs:
        if r.name in seen:
            raise where.error(f"two files are named '{r.name}'; each route or scenario may appear once")
        seen.add(r.name)


def _parameter(item, where, robot, robot_data) -> Parameter:
    p = F.expect_map(item, where, "a parameter mapping {wheels, key, values | range | samples}")
    F.check_keys(p, PARAM_KEYS, where)
    at = lambda k: where.at(p, k)
    given = [k for k in ("wheel", "wheels", "footprint") if k in p]
    if len(given) != 1:
        raise where.error("say what to vary with exactly one of 'wheel: NAME', 'wheels: [NAMES]' "
                          "(with 'key') or 'footprint: length|width|x|y'")
    if given[0] == "footprint":
        key = p["footprint"]
        if key not in FOOTPRINT_KEYS:
            raise at("footprint").error(f"the footprint has no number '{key}'{F.suggest(key, FOOTPRINT_KEYS)}; "
                                        f"allowed: {', '.join(FOOTPRINT_KEYS)}")
        for k in ("key", "mirror"):
            if k in p:
                raise at(k).error(f"'{k}' applies to wheel parameters, not the footprint")
        kind, unit = ("positive" if key in ("length", "width") else "length"), "m"
        target, wheels, signs, default = "footprint", (), (), f"footprint.{key}"
    else:
        target = "wheels"
        if "wheel" in p:
            names = [p["wheel"]]
            nw = [at("wheel")]
        else:
            lst = F.expect_list(p["wheels"], at("wheels"), "a list of wheel names")
            if not lst:
                raise at("wheels").error("name at least one wheel")
            names = list(lst)
            nw = [at("wheels").at(lst, j) for j in range(len(lst))]
        wheels = []
        for n, w in zip(names, nw):
            if not isinstance(n, str) or n not in robot.index:
                raise w.error(f"no wheel named {F.describe(n)} in {robot.source}{F.suggest(n, robot.index)}; "
                              f"wheels: {', '.join(robot.index)}")
            if robot.index[n] in wheels:
                raise w.error(f"wheel '{n}' is named twice")
            wheels.append(robot.index[n])
        if "key" not in p:
            raise where.error(f"missing required key 'key' (the number to vary: {', '.join(WHEEL_KEYS)})")
        key = p["key"]
        if key not in WHEEL_KEYS:
            raise at("key").error(f"a wheel has no number {F.describe(key)} a study can vary"
                                  f"{F.suggest(key, WHEEL_KEYS)}; allowed: {', '.join(WHEEL_KEYS)}")
        types, kind, unit = WHEEL_KEYS[key]
        for i, w in zip(wheels, nw):
            t = robot.wheels[i].type
            if t not in types:
                raise w.error(f"wheel '{robot.wheels[i].name}' is {t}; '{key}' applies to "
                              f"{'/'.join(types)} wheels only")
        mirror = F.boolean(p["mirror"], at("mirror")) if "mirror" in p else False
        signs = []
        for i, w in zip(wheels, nw):
            if mirror:
                base = _base_value(robot.wheels[i], key)
                if base == 0:
                    raise w.error(f"mirror keeps the sign each wheel's {key} has in the robot file, but "
                                  f"'{robot.wheels[i].name}' has {key} 0")
                signs.append(-1.0 if base < 0 else 1.0)
            else:
                signs.append(1.0)
        signs = tuple(signs)
        default = ",".join(robot.wheels[i].name for i in wheels) + f".{key}"
    name = default
    if "name" in p:
        name = F.name(p["name"], at("name"))
    forms = [k for k in ("values", "samples") if k in p]
    if "range" in p and "values" in p:
        raise at("range").error("give either 'values' or 'range' (with 'count' or 'samples'), not both")
    if not forms and "range" not in p:
        raise where.error("give the values: 'values: [...]', 'range: {from, to, count}', "
                          "or 'samples: N' with 'range: {from, to}'")
    parse = lambda v, w: _value(v, w, kind, unit)
    common = dict(name=name, target=target, key=key, wheels=tuple(wheels), signs=signs, line=where.line)
    if "values" in p:
        vw = at("values")
        vals = F.expect_list(p["values"], vw, "a list of values")
        if not vals:
            raise vw.error("the list of values is empty; give at least one")
        out = tuple(parse(v, vw.at(vals, j)) for j, v in enumerate(vals))
        if len(set(out)) != len(out):
            raise vw.error("a value is listed twice")
        return Parameter(values=out, **common)
    rw = at("range")
    r = F.expect_map(p["range"], rw, "a mapping {from, to, count}")
    sampled = "samples" in p
    F.check_keys(r, ("from", "to") if sampled else ("from", "to", "count"), rw,
                 required=("from", "to") if sampled else ("from", "to", "count"))
    lo = parse(r["from"], rw.at(r, "from"))
    hi = parse(r["to"], rw.at(r, "to"))
    if sampled:
        n = p["samples"]
        if isinstance(n, bool) or not isinstance(n, int) or n < 1:
            raise at("samples").error(f"expected a whole number of samples >= 1, got {F.describe(n)}")
        if not lo < hi:
            raise rw.error(f"empty range: 'from' ({lo:g}) must be below 'to' ({hi:g}) to draw samples from it")
        return Parameter(samples=n, low=lo, high=hi, **common)
    n = r["count"]
    cw = rw.at(r, "count")
    if isinstance(n, bool) or not isinstance(n, int) or n < 1:
        raise cw.error(f"expected a whole number of values >= 1, got {F.describe(n)}")
    if n == 1:
        if lo != hi:
            raise cw.error("count 1 takes one value: make 'from' and 'to' equal, or count >= 2")
        return Parameter(values=(lo,), **common)
    if not lo < hi:
        raise rw.error(f"empty range: 'from' ({lo:g}) must be below 'to' ({hi:g}) for {n} values")
    vals = tuple(lo + (hi - lo) * j / (n - 1) for j in range(n))
    return Parameter(values=vals, **common)


def _base_value(wheel, key) -> float:
    if key == "steer_limits":
        return wheel.steer_limits[1]
    return float(getattr(wheel, key))


def _value(v, where, kind, unit) -> float:
    if kind in ("angle", "limits"):
        x = F.angle(v, where)
    elif kind == "turn_rate":
        x = F.angle(v, where, rate=True)
    else:
        x = F.number(v, where, unit=unit)
    return x  # its sign is the robot file's business: a value it refuses is that variant's status
