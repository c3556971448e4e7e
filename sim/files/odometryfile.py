"""The ``odometry`` section of a scenario: validated into an :class:`~sim.odometry.encoders.OdometrySpec`."""
from __future__ import annotations

from sim.files import fields as F
from sim.model.robot import Robot
from sim.odometry.encoders import DeadReckoner, OdometrySpec, nominal_robot

_KEYS = ("wheels", "nominal", "count_noise", "slip_noise", "seed")
_NOMINAL_KEYS = ("radius", "x", "y", "heading")

def odometry_from_data(data, where: F.Where, robot: Robot) -> OdometrySpec:
    """Validate a scenario's ``odometry`` mapping against its robot.  Raises InputError."""
    data = F.expect_map(data, where, "a mapping {wheels, nominal, count_noise, slip_noise, seed}")
    F.check_keys(data, _KEYS, where)
    at = lambda k: where.at(data, k)
    if "wheels" in data:
        ww = at("wheels")
        items = F.expect_list(data["wheels"], ww, "a list of wheel names")
        if not items:
            raise ww.error("list at least one measured wheel")
        names = []
        for j, nm in enumerate(items):
            w = ww.at(items, j)
            if not isinstance(nm, str) or nm not in robot.index:
                raise w.error(f"no wheel named {F.describe(nm)}{F.suggest(nm, robot.index)}; "
                              f"wheels: {', '.join(robot.index)}")
            if nm in names:
                raise w.error(f"wheel '{nm}' is listed twice")
            wheel = robot.wheel(nm)
            if wheel.type == "ball":
                raise w.error(f"wheel '{nm}' is a ball wheel: it has no rolling direction, so its "
                              "rotation says nothing about the body motion")
            if wheel.encoder is None:
                raise w.error(f"wheel '{nm}' has no encoder; add 'encoder: COUNTS' (per revolution) "
                              f"to it in the robot file ({robot.source})")
            names.append(nm)
        names = tuple(sorted(names, key=robot.index.get))
    else:
        names = tuple(w.name for w in robot.wheels if w.encoder is not None and w.type != "ball")
        if not names:
            raise where.error("no wheel has an encoder: add 'encoder: COUNTS' (per revolution) to the "
                              "measured wheels in the robot file, or list them under 'wheels'")
    nominal = []
    if "nominal" in data:
        nw = at("nominal")
        nm_map = F.expect_map(data["nominal"], nw, "a mapping of wheel name to {radius, x, y, heading}")
        for name, vals in nm_map.items():
            w = nw.at(nm_map, name)
            if name not in robot.index:
                raise w.error(f"no wheel named {F.describe(name)}{F.suggest(name, robot.index)}")
            wheel = robot.wheel(name)
            vals = F.expect_map(vals, w, "a mapping {radius, x, y, heading}")
            F.check_keys(vals, _NOMINAL_KEYS, w)
            for key in vals:
                kw = w.at(vals, key)
                if key == "radius":
                    v = F.number(vals[key], kw, positive=True, unit="m")
                elif key == "heading":
                    if wheel.type not in ("fixed", "swedish"):
                        raise kw.error(f"wheel '{name}' is {wheel.type}: its heading is read by its angle "
                                       "sensor (steer_resolution), not believed; only fixed and swedish "
                                       "wheels take a nominal heading")
                    v = F.angle(vals[key], kw)
                else:
                    v = F.number(vals[key], kw, unit="m")
                nominal.append((name, key, v))
    noise = {}
    for key in ("count_noise", "slip_noise"):
        unit = "counts per sqrt(revolution)" if key == "count_noise" else "dimensionless"
        noise[key] = F.number(data[key], at(key), nonnegative=True, unit=unit) if key in data else 0.0
    seed = None
    if "seed" in data:
        seed = F.whole(data["seed"], at("seed"), minimum=0, maximum=2 ** 128 - 1)
    spec = OdometrySpec(names, tuple(nominal), noise["count_noise"], noise["slip_noise"], seed, where.line)
    est = DeadReckoner(nominal_robot(robot, spec), [robot.index[n] for n in names])
    rank = est.rank(robot.arrays.heading)
    if rank < 3:
        raise (at("wheels") if "wheels" in data else where).error(
            f"the measured wheels ({', '.join(names)}) and the fixed wheels' no-sliding rows determine "
            f"only {rank} of the 3 body motions (vx, vy, omega); measure more wheels")
    return spec
