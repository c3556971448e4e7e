"""Route files (README "Route file"): waypoints, optional headings, corner radius, speed cap.

```yaml
name: lobby-to-bay-12
waypoints:              # world frame, m; an optional third value is the heading to hold there
  - [0, 0]
  - [6, 0]
  - [6, 4, 90 deg]
corner_radius: 0.0      # m, optional (0: sharp corners)
speed: 1.2              # m/s, optional cap along the whole route
tolerance: {position: 0.01, heading: 1 deg}   # optional: when the end pose counts as reached
```

Everything is checked up front; bad input raises :class:`~sim.errors.InputError` with
``file:line: message`` (a route whose corners cannot be rounded names the waypoint).
"""
from __future__ import annotations

import math
import os

from sim.errors import InputError
from sim.files import fields as F
from sim.files.yamlread import load_file
from sim.model.route import DEFAULT_TOLERANCE, Route, RouteShapeError

KEYS = ("name", "waypoints", "corner_radius", "speed", "tolerance", "description")


def load_route(path) -> Route:
    """Read and check a route file.  Raises :class:`InputError`."""
    source = os.fspath(path)
    data = load_file(source)
    return route_from_data(data, source)


def route_from_data(data, source="<inline>", where=None) -> Route:
    """A :class:`Route` from parsed YAML (a mapping with line numbers)."""
    where = where or F.Where(source, "", getattr(data, "line", 1) or 1)
    if data is None:
        raise where.error("empty route; expected a mapping with waypoints")
    m = F.expect_map(data, where, "a route mapping {name, waypoints, corner_radius, speed}")
    F.check_keys(m, KEYS, where, required=("waypoints",))
    at = lambda k: where.at(m, k)
    name = os.path.splitext(os.path.basename(source))[0] if source != "<inline>" else "route"
    if "name" in m:
        name = F.name(m["name"], at("name"))
    if "description" in m and not isinstance(m["description"], str):
        raise at("description").error("expected text")
    items = F.expect_list(m["waypoints"], at("waypoints"), "a list of waypoints [x, y] or [x, y, heading]")
    if len(items) < 2:
        raise at("waypoints").error(f"a route needs at least 2 waypoints, got {len(items)}")
    pts, heads, lines = [], [], []
    for i, item in enumerate(items):
        w = at("waypoints").at(items, i)
        if not isinstance(item, list) or len(item) not in (2, 3):
            raise w.error(f"expected [x, y] or [x, y, heading] (m, m, angle), got {F.describe(item)}")
        x = F.number(item[0], w.at(item, 0), unit="m")
        y = F.number(item[1], w.at(item, 1), unit="m")
        h = F.angle(item[2], w.at(item, 2)) if len(item) == 3 else None
        if pts and math.hypot(x - pts[-1][0], y - pts[-1][1]) <= 1e-9:
            raise w.error(f"waypoint {i} repeats waypoint {i - 1} ({x:g}, {y:g}); consecutive waypoints must differ")
        pts.append((x, y))
        heads.append(h)
        lines.append(w.line)
    radius = F.number(m.get("corner_radius", 0.0), at("corner_radius"), nonnegative=True, unit="m")
    speed = math.inf
    if "speed" in m:
        speed = F.number(m["speed"], at("speed"), positive=True, unit="m/s")
    tol = DEFAULT_TOLERANCE
    if "tolerance" in m:
        tol = tolerance(m["tolerance"], at("tolerance"), DEFAULT_TOLERANCE)
    route = Route(name, pts, tuple(heads), radius, speed, tol, source, tuple(lines))
    try:
        route.path
    except RouteShapeError as exc:
        raise InputError(source, lines[exc.waypoint], f"waypoints[{exc.waypoint}]: {exc.message}") from None
    return route


def tolerance(value, where, default) -> tuple:
    """(position m, heading rad) from ``{position, heading}``; missing keys keep ``default``."""
    tm = F.expect_map(value, where, "a mapping {position, heading}")
    F.check_keys(tm, ("position", "heading"), where)
    pos, head = default
    if "position" in tm:
        pos = F.number(tm["position"], where.at(tm, "position"), positive=True, unit="m")
    if "heading" in tm:
        head = F.angle(tm["heading"], where.at(tm, "heading"))
        if head <= 0:
            raise where.at(tm, "heading").error("must be > 0")
    return (pos, head)
