"""Robot files: read and validate a robot description into a :class:`~sim.model.robot.Robot`.

See README "Robot file" for the format.  A robot file is a regular file of at
most :data:`MAX_BYTES` (a base of a hundred wheels takes about 10 KiB).
"""
from __future__ import annotations

import math
import os
from dataclasses import replace

import numpy as np

from sim.files import fields as F
from sim.files.reading import read_limited
from sim.files.yamlread import load_bytes
from sim.model.robot import WHEEL_TYPES, Robot, Wheel

_COMMON = ("name", "type", "x", "y", "heading", "radius", "driven",
           "max_spin", "max_spin_accel", "encoder")
_EXTRA = {
    "fixed": (),
    "steered": ("steer_limits", "max_steer_rate", "steer_resolution"),
    "castor": ("trail", "steer_resolution"),
    "swedish": ("roller",),
    "ball": (),
}
_ROBOT_KEYS = ("name", "footprint", "wheels")
MAX_BYTES = 64 * 1024
MAX_ENCODER = 2 ** 48          # counts per revolution (cumulative counts stay exact in a float)


def load_robot(path: str | os.PathLike) -> Robot:
    """Read and validate a robot file.  Raises :class:`InputError`."""
    return read_robot(path)[0]


def read_robot(path: str | os.PathLike) -> tuple:
    """``(Robot, file bytes)``: the robot file read once, validated, with its content (for hashing)."""
    source = os.fspath(path)
    raw = read_limited(source, MAX_BYTES, "robot file")
    return robot_from_data(load_bytes(raw, source), source), raw


MAX_PLAUSIBLE_RADIUS = 1.0    # m: a larger wheel radius is warned about (metres, not millimetres?)
MAX_PLAUSIBLE_MOUNT = 20.0    # m: a mount point farther from the body origin is warned about


def robot_from_data(data, source: str = "<inline>", where: F.Where | None = None) -> Robot:
    """Validate parsed YAML (a mapping) into a :class:`Robot`.

    Plausibility warnings (see :func:`plausibility`) go to ``where.notes`` when
    the caller gave one, and always to ``Robot.warnings``.
    """
    where = where or F.Where(source, "", getattr(data, "line", 1) or 1)
    if where.notes is None:
        where = replace(where, notes=[])
    first = len(where.notes)
    robot = _robot(data, where, source)
    plausibility(robot, data, where)
    return replace(robot, warnings=tuple(where.notes[first:]))


def _robot(data, where: F.Where, source: str) -> Robot:
    if data is None:
        raise where.error("empty robot description; expected a mapping with 'wheels'")
    data = F.expect_map(data, where, "a robot description (a mapping with name, footprint, wheels)")
    F.check_keys(data, _ROBOT_KEYS, where, required=("wheels",))
    name = F.name(data["name"], where.at(data, "name")) if "name" in data else "robot"
    length, width, fx, fy, polygon = 0.6, 0.4, 0.0, 0.0, None
    if "footprint" in data:
        fw = where.at(data, "footprint")
        fp = F.expect_map(data["footprint"], fw, "a mapping {length, width, x, y} or {polygon}")
        if "polygon" in fp:
            other = [k for k in fp if k != "polygon"]
            if other:
                raise fw.at(fp, other[0]).error(
                    f"a footprint is either {{length, width, x, y}} or {{polygon}}, not both ('{other[0]}' and 'polygon')")
            polygon = footprint_polygon(fp["polygon"], fw.at(fp, "polygon"))
            xs, ys = [p[0] for p in polygon], [p[1] for p in polygon]
            length, width = max(xs) - min(xs), max(ys) - min(ys)
            fx, fy = (max(xs) + min(xs)) / 2, (max(ys) + min(ys)) / 2
        else:
            F.check_keys(fp, ("length", "width", "x", "y", "polygon"), fw, required=("length", "width"))
            length = F.number(fp["length"], fw.at(fp, "length"), positive=True, unit="m")
            width = F.number(fp["width"], fw.at(fp, "width"), positive=True, unit="m")
            fx = F.number(fp.get("x", 0.0), fw.at(fp, "x"), unit="m")
            fy = F.number(fp.get("y", 0.0), fw.at(fp, "y"), unit="m")
    ww = where.at(data, "wheels")
    items = F.expect_list(data["wheels"], ww, "a list of wheels")
    if not items:
        raise ww.error("a base needs at least one wheel")
    wheels, seen = [], {}
    for i, item in enumerate(items):
        w = _wheel(item, ww.at(items, i))
        if w.name in seen:
            raise ww.at(items, i).error(f"duplicate wheel name '{w.name}' (first used on line {seen[w.name]})")
        seen[w.name] = w.line
        wheels.append(w)
    return Robot(name=name, wheels=tuple(wheels), length=length, width=width, source=source,
                 footprint_x=fx, footprint_y=fy, polygon=polygon)


def footprint_polygon(value, where: F.Where) -> tuple:
    """A footprint polygon: a list of [x, y] (m, body frame), at least 3 vertices, simple.

    Returns a tuple of (x, y) tuples, counter-clockwise, without a repeated
    closing vertex.
    """
    import shapely

    pts = F.points(value, where, "a list of [x, y] vertices (m, body frame)", noun="vertex")
    if len(pts) > 1 and pts[0] == pts[-1]:
        pts.pop()                                     # a closing vertex repeating the first is allowed
    if len(pts) < 3:
        raise where.error(f"a footprint polygon needs at least 3 distinct vertices, got {len(pts)}")
    poly = shapely.Polygon(pts)
    if not poly.is_valid:
        raise where.error(f"the footprint polygon is not simple ({F.geometry_problem(poly)}); "
                          "list the vertices in order around the outline, edges must not cross")
    if not poly.area > 0:
        raise where.error("the footprint polygon has no area")
    if not shapely.is_ccw(poly.exterior):
        pts.reverse()
    return tuple(pts)


def plausibility(robot: Robot, data, where: F.Where) -> None:
    """Warn (``where.warn``) about values that are allowed but probably not meant.

    Per wheel: a radius above :data:`MAX_PLAUSIBLE_RADIUS` or a mount point
    beyond :data:`MAX_PLAUSIBLE_MOUNT` (values are metres).  A base driven by
    Swedish wheels alone (mecanum, omni) whose forward map is singular or
    worse conditioned than :data:`sim.theory.kinematics.COND_WARN`: its roller
    pattern leaves a motion uncontrolled or nearly so (the weak motion is named).
    Plain angles above 2 pi are warned about where they are read (:func:`fields.angle`).
    """
    from sim.theory.kinematics import COND_WARN, forward_conditioning

    items = data["wheels"]
    ww = where.at(data, "wheels")
    for i, w in enumerate(robot.wheels):
        at = lambda k: ww.at(items, i).at(items[i], k)
        if w.radius > MAX_PLAUSIBLE_RADIUS:
            at("radius").warn(f"radius {w.radius:g} m is larger than {MAX_PLAUSIBLE_RADIUS:g} m; values are metres "
                              f"({w.radius:g} mm would be {w.radius / 1000:g})")
        d = math.hypot(w.x, w.y)
        if d > MAX_PLAUSIBLE_MOUNT:
            at("x" if abs(w.x) >= abs(w.y) else "y").warn(
                f"wheel '{w.name}' is mounted {d:g} m from the body origin, beyond {MAX_PLAUSIBLE_MOUNT:g} m; "
                "values are metres")
    a = robot.arrays
    driven = a.driven
    if np.any(driven) and not np.any(a.is_("fixed", "steered")) and np.all(a.is_("swedish")[driven]):
        c = forward_conditioning(robot)
        if c.number > COND_WARN:
            vx, vy, om = c.weak
            motion = f"vx {vx:.3f} m/s, vy {vy:.3f} m/s, omega {om:.3f} rad/s"
            scale = f"(omega weighted by the base size, {robot.size:.3g} m)"
            if math.isinf(c.number):
                ww.warn(f"the roller pattern leaves a motion uncontrolled: no wheel spin produces or resists "
                        f"{motion}; the forward map's condition number is infinite {scale}; check the roller "
                        "signs (README: rollers of a mecanum base)")
            else:
                ww.warn(f"the roller pattern leaves a motion nearly uncontrolled: the forward map's condition "
                        f"number is {c.number:.3g} (above {COND_WARN:g}) {scale}, its weak motion {motion}; "
                        "check the roller angles and signs (README: rollers of a mecanum base)")


def _wheel(item, where: F.Where) -> Wheel:
    item = F.expect_map(item, where, "a wheel mapping")
    F.check_keys(item, _COMMON + tuple(dict.fromkeys(k for ks in _EXTRA.values() for k in ks)), where,
                 required=("name", "type", "x", "y", "radius"))
    at = lambda k: where.at(item, k)
    wtype = F.choice(item["type"], WHEEL_TYPES, at("type"))
    allowed = _COMMON + _EXTRA[wtype]
    for key in item:
        if key not in allowed:
            owners = [t for t, ks in _EXTRA.items() if key in ks]
            raise at(key).error(f"'{key}' applies to {'/'.join(owners)} wheels only, not {wtype}")
    name = F.name(item["name"], at("name"))
    kw = dict(
        name=name, type=wtype,
        x=F.number(item["x"], at("x"), unit="m"),
        y=F.number(item["y"], at("y"), unit="m"),
        heading=F.angle(item.get("heading", 0.0), at("heading")),
        radius=F.number(item["radius"], at("radius"), positive=True, unit="m"),
        line=where.line,
    )
    driven = wtype in ("fixed", "steered", "swedish")
    if "driven" in item:
        driven = F.boolean(item["driven"], at("driven"))
        if driven and wtype == "ball":
            raise at("driven").error("ball wheels are passive; driven must be false")
    kw["driven"] = driven
    if "max_spin" in item:
        kw["max_spin"] = F.number(item["max_spin"], at("max_spin"), positive=True, unit="rad/s")
    if "max_spin_accel" in item:
        kw["max_spin_accel"] = F.number(item["max_spin_accel"], at("max_spin_accel"), positive=True, unit="rad/s^2")
    if "encoder" in item:
        kw["encoder"] = F.whole(item["encoder"], at("encoder"), minimum=1, maximum=MAX_ENCODER,
                                what="encoder counts per revolution, a whole number")
    if "steer_resolution" in item:
        kw["steer_resolution"] = F.angle(item["steer_resolution"], at("steer_resolution"))
        if kw["steer_resolution"] <= 0:
            raise at("steer_resolution").error("must be > 0")
    if wtype == "steered":
        if "steer_limits" in item:
            sw = at("steer_limits")
            lim = F.expect_list(item["steer_limits"], sw, "[low, high] angles")
            if len(lim) != 2:
                raise sw.error(f"expected [low, high], got {len(lim)} values")
            lo, hi = (F.angle(v, sw.at(lim, j)) for j, v in enumerate(lim))
            if not lo < hi:
                raise sw.error("low limit must be below high limit")
            if not lo <= kw["heading"] <= hi:
                raise at("heading").error(
                    f"starting angle {math.degrees(kw['heading']):g} deg is outside steer_limits "
                    f"[{math.degrees(lo):g}, {math.degrees(hi):g}] deg")
            kw["steer_limits"] = (lo, hi)
        if "max_steer_rate" in item:
            kw["max_steer_rate"] = F.number(item["max_steer_rate"], at("max_steer_rate"), positive=True, unit="rad/s")
    if wtype == "castor":
        if "trail" not in item:
            raise where.error("castor wheels need 'trail' (m > 0, contact point behind the steering axis)")
        kw["trail"] = F.number(item["trail"], at("trail"), positive=True, unit="m")
    if wtype == "swedish" and "roller" in item:
        g = F.angle(item["roller"], at("roller"))
        if not -math.pi / 2 + 1e-9 < g < math.pi / 2 - 1e-9:
            raise at("roller").error(f"roller angle must lie strictly between -90 and 90 deg, got {math.degrees(g):g} deg")
        kw["roller"] = g
    return Wheel(**kw)
