"""Floor files: GeoJSON (RFC 7946) or the same features as a YAML mapping.

GeoJSON: a ``FeatureCollection`` whose features have a ``Polygon``,
``MultiPolygon``, ``LineString`` or ``MultiLineString`` geometry; the name
is ``properties.name`` (default ``features[i]``).  Coordinates are read as
planar metres in the scenario's world frame (x, y; a third value, an
altitude, is ignored).  Rings must be closed (first position repeated last),
as RFC 7946 requires; either winding is accepted (RFC 7946 section 3.1.6 asks
parsers not to reject the other).  Members this reader does not know (``id``,
``bbox``, foreign members) are ignored.  JSON's ``NaN`` / ``Infinity`` (which
Python's json accepts) are refused like any non-finite coordinate.

YAML (a scenario's inline ``floor:`` mapping or a ``.yaml`` floor file): a
mapping of feature name to ``{line: [[x, y], ...]}`` or ``{polygon: [[x, y],
...], holes: [[[x, y], ...], ...]}`` (a polygon's closing vertex optional).

Every error is :class:`~sim.errors.InputError` naming the file, the line (of
the feature, for GeoJSON) and the feature (``features[3] 'door-left'``).
See README "Floors".
"""
from __future__ import annotations

import json
import math
import os

from sim.errors import InputError, clip
from sim.files import fields as F
from sim.files.reading import read_limited
from sim.files.yamlread import load_file, line_of
from sim.model.floor import Feature, Floor

MAX_BYTES = 32 * 1024 * 1024
GEOMETRIES = ("Polygon", "MultiPolygon", "LineString", "MultiLineString")
_ALLOWED = "a floor feature is a Polygon, MultiPolygon, LineString or MultiLineString"
_JSON_WS = " \t\n\r"


def load_floor(path: str | os.PathLike) -> Floor:
    """Read a floor file: GeoJSON (``.geojson``, ``.json``) or YAML (``.yaml``, ``.yml``)."""
    source = os.fspath(path)
    if source.lower().endswith((".yaml", ".yml")):
        data = load_file(source)
        return floor_from_data(data, F.Where(source, "", getattr(data, "line", 1) or 1))
    raw = read_limited(source, MAX_BYTES, "GeoJSON file")  # a regular file only: a FIFO is never waited on
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise InputError(source, raw[: exc.start].count(b"\n") + 1,
                         "GeoJSON must be UTF-8 text (RFC 7946)") from None
    return floor_from_geojson(text, source)


# --------------------------------------------------------------------------
# GeoJSON


def floor_from_geojson(text: str, source: str = "<inline>") -> Floor:
    """Validate GeoJSON text into a :class:`Floor`.  Raises :class:`InputError`."""
    try:
        doc = json.loads(text)
    except json.JSONDecodeError as exc:
        raise InputError(source, exc.lineno, f"malformed JSON: {exc.msg} (column {exc.colno})") from None
    except RecursionError:
        raise InputError(source, None, "values nested too deeply; refusing to read it") from None
    except ValueError as exc:  # an integer of thousands of digits
        raise InputError(source, None, f"bad number: {clip(exc, 80)}") from None
    want = ("a floor is a GeoJSON FeatureCollection (RFC 7946): "
            '{"type": "FeatureCollection", "features": [...]}')
    if not isinstance(doc, dict):
        raise InputError(source, 1, f"not a FeatureCollection: the top level is {_json_kind(doc)}; {want}")
    if doc.get("type") != "FeatureCollection":
        got = doc.get("type")
        raise InputError(source, 1, f"not a FeatureCollection: the top level has type {_show(got)}; {want}")
    feats = doc.get("features")
    if not isinstance(feats, list):
        raise InputError(source, 1, f"'features' must be a list of features, got {_json_kind(feats)}")
    lines = _feature_lines(text)
    out, seen = [], {}
    for i, item in enumerate(feats):
        line = lines[i] if i < len(lines) else None
        f = _geojson_feature(item, i, source, line)
        if f.name in seen:
            raise InputError(source, line, f"features[{i}]: name '{f.name}' is already used by "
                             f"features[{seen[f.name]}]; names must be unique so that reports are clear")
        seen[f.name] = i
        out.append(f)
    return Floor(tuple(out), source)


def _json_kind(v) -> str:
    if v is None:
        return "null"
    if isinstance(v, bool):
        return "a boolean"
    if isinstance(v, (int, float)):
        return "a number"
    if isinstance(v, str):
        return f"the string {_show(v)}"
    if isinstance(v, list):
        return "an array"
    return "an object"


def _show(v) -> str:
    return "none" if v is None else json.dumps(v)[:60]


def _geojson_feature(item, i, source, line) -> Feature:
    def err(msg, name=None):
        label = f"features[{i}]" + (f" '{name}'" if name else "")
        return InputError(source, line, f"{label}: {msg}")

    if not isinstance(item, dict) or item.get("type") != "Feature":
        got = item.get("type") if isinstance(item, dict) else None
        what = f"type {_show(got)}" if isinstance(item, dict) else _json_kind(item)
        raise err(f"expected a GeoJSON Feature object ({{\"type\": \"Feature\", \"geometry\": ..., "
                  f"\"properties\": ...}}), got {what}")
    props = item.get("properties")
    if props is not None and not isinstance(props, dict):
        raise err(f"'properties' must be an object or null, got {_json_kind(props)}")
    name = f"features[{i}]"
    if props and "name" in props:
        name = props["name"]
        if not isinstance(name, str) or not name.strip():
            raise err(f"properties.name must be a non-empty string, got {_json_kind(name)}")
    shown = name if props and "name" in props else None
    geom = item.get("geometry")
    if geom is None:
        raise err(f"has no geometry (null); {_ALLOWED}", shown)
    if not isinstance(geom, dict):
        raise err(f"'geometry' must be an object, got {_json_kind(geom)}", shown)
    gtype = geom.get("type")
    if gtype not in GEOMETRIES:
        raise err(f"geometry type {_show(gtype)} is not allowed; {_ALLOWED}", shown)
    if "coordinates" not in geom:
        raise err(f"the {gtype} has no 'coordinates'", shown)
    coords = geom["coordinates"]
    try:
        if gtype == "LineString":
            parts = [_line(coords, "geometry.coordinates")]
        elif gtype == "MultiLineString":
            parts = [_line(c, f"geometry.coordinates[{j}]") for j, c in enumerate(_array(coords, "geometry.coordinates", "an array of lines"))]
        elif gtype == "Polygon":
            parts = [_polygon(coords, "geometry.coordinates")]
        else:
            parts = [_polygon(c, f"geometry.coordinates[{j}]") for j, c in enumerate(_array(coords, "geometry.coordinates", "an array of polygons"))]
    except _Bad as exc:
        raise err(str(exc), shown) from None
    if not parts:
        raise err(f"the {gtype} has no parts", shown)
    kind = "line" if "Line" in gtype else "polygon"
    feat = (Feature.polyline(name, parts[0], i, line, parts[1:]) if kind == "line"
            else Feature.polygon(name, parts[0], i, line, parts[1:]))
    problem = _geometry_problem(feat)
    if problem:
        raise err(problem, shown)
    return feat


class _Bad(Exception):
    """A problem inside a geometry, with the path to the bad value."""


def _array(v, path, what):
    if not isinstance(v, list):
        raise _Bad(f"{path}: expected {what}, got {_json_kind(v)} (wrong nesting?)")
    return v


def _position(v, path):
    if not isinstance(v, list) or not v or isinstance(v[0], list):
        raise _Bad(f"{path}: expected a position [x, y] (m), got {_json_kind(v)} (wrong nesting?)")
    if len(v) not in (2, 3):
        raise _Bad(f"{path}: a position is [x, y] or [x, y, altitude], got {len(v)} values")
    out = []
    for k, c in enumerate(v[:2]):
        if isinstance(c, bool) or not isinstance(c, (int, float)):
            raise _Bad(f"{path}[{k}]: expected a number (m), got {_json_kind(c)}")
        if not math.isfinite(c):
            raise _Bad(f"{path}[{k}]: expected a finite number (m), got {c}")
        out.append(float(c))
    return out


def _line(v, path):
    pts = [_position(p, f"{path}[{k}]") for k, p in enumerate(_array(v, path, "an array of positions"))]
    if len(pts) < 2:
        raise _Bad(f"{path}: a line needs at least 2 positions, got {len(pts)}")
    return pts


def _polygon(v, path):
    rings = []
    for r, ring in enumerate(_array(v, path, "an array of linear rings")):
        rp = f"{path}[{r}]"
        pts = [_position(p, f"{rp}[{k}]") for k, p in enumerate(_array(ring, rp, "a linear ring (an array of positions)"))]
        if len(pts) < 4:
            raise _Bad(f"{rp}: a linear ring needs at least 4 positions (RFC 7946), got {len(pts)}")
        if pts[0] != pts[-1]:
            raise _Bad(f"{rp}: a linear ring must end where it starts (RFC 7946: first and last "
                       "positions equal)")
        rings.append(pts[:-1])
    if not rings:
        raise _Bad(f"{path}: a polygon needs an exterior ring")
    return rings


def _feature_lines(text: str) -> list:
    """Line of the start of each element of the top-level ``features`` array (best effort, [] if unsure)."""
    dec = json.JSONDecoder()
    n = len(text)
    pos, line = 0, 1

    def skip(i):
        while i < n and text[i] in _JSON_WS:
            i += 1
        return i

    def line_at(i):
        nonlocal pos, line
        line += text.count("\n", pos, i)
        pos = i
        return line

    try:
        i = skip(1 if text.startswith("\ufeff") else 0)
        if text[i] != "{":
            return []
        i = skip(i + 1)
        found = []
        while text[i] != "}":
            key, i = dec.raw_decode(text, i)
            i = skip(i)
            if text[i] != ":":
                return []
            i = skip(i + 1)
            if key == "features" and text[i] == "[":
                found = []
                i = skip(i + 1)
                while text[i] != "]":
                    found.append(line_at(i))
                    _, i = dec.raw_decode(text, i)
                    i = skip(i)
                    if text[i] == ",":
                        i = skip(i + 1)
                i += 1
            else:
                _, i = dec.raw_decode(text, i)
            i = skip(i)
            if text[i] == ",":
                i = skip(i + 1)
        return found
    except (IndexError, ValueError, RecursionError):
        return []


# --------------------------------------------------------------------------
# YAML


def floor_from_data(data, where: F.Where) -> Floor:
    """Validate a YAML mapping {name: {line | polygon [, holes]}} into a :class:`Floor`."""
    what = "a mapping of feature name to {line: [[x, y], ...]} or {polygon: [[x, y], ...]}"
    if data is None:
        raise where.error(f"empty floor; expected {what}")
    m = F.expect_map(data, where, what)
    out = []
    for i, (name, spec) in enumerate(m.items()):
        w = where.at(m, name)
        if not isinstance(name, str) or not name.strip():
            raise w.error("a feature name must be text")
        spec = F.expect_map(spec, w, "{line: [[x, y], ...]} or {polygon: [[x, y], ...], holes: [...]}")
        kinds = [k for k in ("line", "polygon") if k in spec]
        if len(kinds) != 1:
            unknown = [k for k in spec if k not in ("line", "polygon", "holes")]
            if unknown:
                F.check_keys(spec, ("line", "polygon", "holes"), w)
            raise w.error(f"feature '{name}' needs exactly one of 'line' (a polyline [[x, y], ...]) or "
                          "'polygon' ([[x, y], ...], optional 'holes')")
        line = line_of(m, name, where.line)
        if kinds[0] == "line":
            F.check_keys(spec, ("line",), w)
            pts = _yaml_points(spec["line"], w.at(spec, "line"))
            if len(pts) < 2:
                raise w.at(spec, "line").error(f"a line needs at least 2 points, got {len(pts)}")
            feat = Feature.polyline(name, pts, i, line)
        else:
            F.check_keys(spec, ("polygon", "holes"), w)
            rings = [_yaml_ring(spec["polygon"], w.at(spec, "polygon"))]
            if "holes" in spec:
                hw = w.at(spec, "holes")
                holes = F.expect_list(spec["holes"], hw, "a list of rings [[x, y], ...]")
                rings += [_yaml_ring(h, hw.at(holes, k)) for k, h in enumerate(holes)]
            feat = Feature.polygon(name, rings, i, line)
        problem = _geometry_problem(feat)
        if problem:
            raise w.error(problem)
        out.append(feat)
    return Floor(tuple(out), where.source)


def _yaml_points(value, where):
    return [list(p) for p in F.points(value, where)]


def _yaml_ring(value, where):
    pts = _yaml_points(value, where)
    if len(pts) > 1 and pts[0] == pts[-1]:
        pts.pop()
    if len(pts) < 3:
        raise where.error(f"a polygon ring needs at least 3 distinct points, got {len(pts)}")
    return pts


# --------------------------------------------------------------------------
# geometry checks (GEOS, through shapely)


def _geometry_problem(feat: Feature) -> str | None:
    """What is wrong with a feature's geometry, or None."""
    import shapely

    if feat.kind == "line":
        for j, p in enumerate(feat.parts):
            if shapely.LineString(p).length <= 0:
                at = f" (part {j})" if len(feat.parts) > 1 else ""
                return f"the line{at} has zero length; give at least two different points"
        return None
    for j, rings in enumerate(feat.parts):
        poly = shapely.Polygon(rings[0], rings[1:])
        at = f" (part {j})" if len(feat.parts) > 1 else ""
        if not poly.is_valid:
            return (f"the polygon{at} is not valid ({F.geometry_problem(poly)}); a ring must not cross or "
                    "touch itself, holes must lie inside the exterior ring")
        if not poly.area > 0:
            return f"the polygon{at} has no area"
    if len(feat.parts) > 1:
        multi = shapely.MultiPolygon([shapely.Polygon(r[0], r[1:]) for r in feat.parts])
        if not multi.is_valid:
            return (f"the MultiPolygon is not valid ({F.geometry_problem(multi)}); its polygons must not "
                    "overlap")
    return None
