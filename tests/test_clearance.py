"""Floors, footprints and clearance against hand computations; bad floor files.

References (each check names its own): the support function of a rectangle
(its half-extent along a unit normal n is L/2 |n . e_x| + W/2 |n . e_y|;
common practice, from memory), the distance from a point to a segment
(common practice), the area swept by a shape translated along a line
(Minkowski sum with a segment: A + d x the width across the motion, for shapes
whose cross-sections across the motion are single intervals; common practice),
and shapely's own buffer of a point as the reference disc.
"""
from __future__ import annotations

import json
import math
import os
import re

import numpy as np
import pytest
import shapely

from sim.model.floor import Feature, Floor
from sim.runs.clearance import (SWEEP_TOLERANCE, ClearanceMeter, clearance_along, sleeve_fit,
                                world_vertices)
from sim.runs.runner import run_scenario

from conftest import ROBOTS, SCENARIOS

WARD_L, WARD_W = 0.70, 0.50          # scenarios/robots/ward-cart.yaml footprint (m)

# a differential-drive base without acceleration limits: it runs at the commanded speed from
# the first step (constant speed, as the hand computations assume)
NO_RAMP_ROBOT = """
  name: plain-diff
  footprint: {length: 0.7, width: 0.5}
  wheels:
    - {name: left,  type: fixed, x: 0.0, y: 0.22, radius: 0.08}
    - {name: right, type: fixed, x: 0.0, y: -0.22, radius: 0.08}
"""


def wall(y, name="wall", x0=-20.0, x1=20.0, index=0):
    return Feature.polyline(name, [(x0, y), (x1, y)], index)


def poses_of(trace):
    return np.column_stack([trace["x"], trace["y"], trace["theta"]])


def scenario(tmp_path, scenario_from_yaml, body, floor_text=None, name="s.yaml"):
    extra = {"floor.geojson": floor_text} if floor_text is not None else {}
    extra["plain.yaml"] = NO_RAMP_ROBOT
    return scenario_from_yaml(tmp_path, body, name, extra)


def geojson(*features):
    """A FeatureCollection with features[i] on line 2 + i."""
    return ('{"type": "FeatureCollection", "features": [\n'
            + ",\n".join(json.dumps(f) for f in features) + "\n]}\n")


def feat(name, gtype, coords):
    return {"type": "Feature", "properties": {"name": name}, "geometry": {"type": gtype, "coordinates": coords}}


# --------------------------------------------------------------------------
# clearance against hand computations


def test_rectangle_passing_a_wall_at_a_known_offset(tmp_path, scenario_from_yaml):
    # the ward cart drives 2 m along x at y = 0, heading 0; a wall runs along y = W/2 + 0.1234
    # and another along y = -(W/2 + 0.3): the clearances are the offsets, to 1e-9
    floor = geojson(feat("north", "LineString", [[-5, WARD_W / 2 + 0.1234], [5, WARD_W / 2 + 0.1234]]),
                    feat("south", "LineString", [[-5, -WARD_W / 2 - 0.3], [5, -WARD_W / 2 - 0.3]]))
    scen = scenario(tmp_path, scenario_from_yaml, f"""
        robot: {ROBOTS / 'ward-cart.yaml'}
        floor: floor.geojson
        step: 0.01
        duration: 5
        script: [{{at: 0, twist: {{vx: 0.4}}}}]
        checks:
          - clearance_above: 0.1233
          - clearance_above: 0.1235
          - no_contact: true
    """, floor)
    res = run_scenario(scen, keep=True)
    cl = clearance_along(scen.robot.outline, poses_of(res.trace), scen.floor, t=res.trace["t"])
    north, south = cl.features
    assert abs(north.distance - 0.1234) < 1e-9 and abs(south.distance - 0.3) < 1e-9
    assert cl.first_contact is None and cl.contact_rows == 0
    # the closest pair is a point on the base's left edge and its foot on the wall
    assert abs(north.base_point[1] - WARD_W / 2) < 1e-9 and abs(north.body_point[1] - WARD_W / 2) < 1e-9
    assert abs(north.feature_point[1] - (WARD_W / 2 + 0.1234)) < 1e-12
    assert abs(north.feature_point[0] - north.base_point[0]) < 1e-9
    above, above_more, none = res.checks
    assert above.passed and not above_more.passed and none.passed
    assert "0.1234 m to 'north'" in above.text and "no contact" in above.text
    # the checks measure every row as the run goes, with or without a kept trace
    again = run_scenario(scen)
    assert [c.text for c in again.checks] == [c.text for c in res.checks]


def test_clearance_checks_of_a_run_a_controller_drives(tmp_path, scenario_from_yaml):
    # no script: a controller in the loop commands the base (0.4 m/s forward, then turning
    # left from t = 1 s); the checks measure the rows the run made, as it made them
    class Turner:
        def command(self, obs):
            return (0.4, 0.0, 0.0) if obs.t < 1.0 else (0.4, 0.0, 0.6)

    floor = geojson(feat("wall", "LineString", [[-1, 0.5], [3, 0.5]]))
    scen = scenario(tmp_path, scenario_from_yaml, """
        robot: plain.yaml
        floor: floor.geojson
        step: 0.01
        duration: 3
        checks: [{no_contact: true}, {clearance_above: 0.0}]
    """, floor)
    res = run_scenario(scen, keep=True, controller=Turner())
    cl = clearance_along(scen.robot.outline, poses_of(res.trace), scen.floor, t=res.trace["t"])
    assert cl.first_contact is not None and 1.0 < cl.first_contact.t < 3.0
    touch, clear = res.checks
    assert not touch.passed and not clear.passed
    assert f"first contact with 'wall' at t={cl.first_contact.t:g} s" in touch.text
    assert f"{cl.contact_rows} rows" in touch.text


def test_clearance_of_a_turned_rectangle_is_the_support_function(robot_from_yaml):
    # a wall along y = c; a rectangle L x W at (x, y, theta) reaches up to
    # y + L/2 |sin theta| + W/2 |cos theta| (support function, common practice), so its
    # clearance is c minus that, at any heading
    rb = robot_from_yaml(NO_RAMP_ROBOT)
    L, W = 0.7, 0.5
    rng = np.random.default_rng(17)
    th = rng.uniform(-math.pi, math.pi, 40)
    poses = np.column_stack([rng.uniform(-2, 2, 40), rng.uniform(-1, 0.5, 40), th])
    c = 1.5
    floor = Floor((wall(c),))
    for p in poses:
        got = clearance_along(rb.outline, p[None], floor).nearest.distance
        want = c - p[1] - (L / 2 * abs(math.sin(p[2])) + W / 2 * abs(math.cos(p[2])))
        assert abs(got - want) < 1e-9, (p, got, want)


def test_straight_into_a_wall_first_contact_at_distance_over_speed(tmp_path, scenario_from_yaml):
    # front face at x = L/2 = 0.35 m; a wall across at x = 0.35 + D: at v it touches at D / v,
    # which the rows (every dt) catch within one step
    D, v, dt = 1.0037, 0.4, 0.01
    floor = geojson(feat("end-wall", "LineString", [[0.35 + D, -3], [0.35 + D, 3]]))
    scen = scenario(tmp_path, scenario_from_yaml, f"""
        robot: plain.yaml
        floor: floor.geojson
        step: {dt}
        duration: 4
        script: [{{at: 0, twist: {{vx: {v}}}}}]
        checks:
          - no_contact: true
          - at: 2
            no_contact: true
          - at: 2
            clearance_above: 0.19
    """, floor)
    res = run_scenario(scen, keep=True)
    cl = clearance_along(scen.robot.outline, poses_of(res.trace), scen.floor, t=res.trace["t"])
    hit = cl.first_contact
    assert hit is not None and hit.feature == "end-wall"
    assert 0.0 <= hit.t - D / v < dt
    assert abs(hit.point[0] - (0.35 + D)) < 1e-9 and 0.35 - v * dt <= hit.body_point[0] <= 0.35 + 1e-9
    # in contact from there to the end (the base drives on through the wall line)
    assert cl.contact_rows == int(np.sum(res.trace["x"] + 0.35 >= 0.35 + D))
    run_check, at2, clear2 = res.checks
    assert not run_check.passed and f"'end-wall' at t={hit.t:g} s" in run_check.text
    assert at2.passed                                 # at t = 2 s it is 0.2037 m short of the wall
    assert clear2.passed and "0.2037 m to 'end-wall' at t=2 s" in clear2.text


def test_swept_area_of_a_translated_rectangle_is_LW_plus_Wd(tmp_path, scenario_from_yaml):
    # translated along its length by d, a rectangle sweeps L W + W d (common practice), exactly
    for heading in (0.0, math.radians(30.0)):
        scen = scenario(tmp_path, scenario_from_yaml, f"""
            robot: {ROBOTS / 'ward-cart.yaml'}
            floor: {{far: {{line: [[50, 50], [51, 50]]}}}}
            step: 0.01
            duration: 4
            start: {{x: 0.3, y: -0.2, theta: {heading}}}
            script: [{{at: 0, twist: {{vx: 0.5}}}}, {{at: 3, stop: true}}]
        """)
        res = run_scenario(scen, keep=True)
        tr = res.trace
        d = math.hypot(tr["x"][-1] - tr["x"][0], tr["y"][-1] - tr["y"][0])
        assert d > 1.4
        cl = clearance_along(scen.robot.outline, poses_of(tr), scen.floor, swept=True)
        want = WARD_L * WARD_W + WARD_W * d
        assert abs(cl.swept_area - want) < 1e-9 * want
        assert abs(cl.swept.length - 2 * (WARD_L + d + WARD_W)) < 1e-9


def test_swept_area_of_a_translated_L_shape(robot_from_yaml):
    # a footprint that is not convex (an L of two 1 x 0.2 m bars): every cross-section across
    # x and across y is one interval, so translated by d along x or y it sweeps A + 1 m x d
    rb = robot_from_yaml("""
        footprint: {polygon: [[0, 0], [1, 0], [1, 0.2], [0.2, 0.2], [0.2, 1], [0, 1]]}
        wheels: [{name: w, type: fixed, x: 0, y: 0, radius: 0.1}]
    """)
    floor = Floor((wall(9.0),))
    for axis in (0, 1):
        poses = np.zeros((300, 3))
        poses[:, axis] = np.linspace(0.0, 0.73, 300)
        cl = clearance_along(rb.outline, poses, floor, swept=True)
        assert abs(cl.swept_area - (0.36 + 0.73)) < 1e-9


def test_turning_in_place_sweeps_the_disc_of_the_half_diagonal(tmp_path, scenario_from_yaml):
    # the ward cart turns once about its axle centre, the middle of its footprint: it sweeps the
    # disc of the half-diagonal r.  Tolerance: between kept rows every vertex keeps within
    # SWEEP_TOLERANCE (1 mm) of its chord, and one step's arc sags r (1 - cos(w dt / 2)) below
    # its chord, so the boundary lies within 1 mm + that sag inside the circle, and the area is
    # short of pi r^2 by at most the ring of that width.  Reference disc: shapely's buffer of a
    # point with 256 segments a quarter (its chords sag r (1 - cos(pi / 1024)) = 2 um).
    w, dt = 0.5, 0.01
    scen = scenario(tmp_path, scenario_from_yaml, f"""
        robot: {ROBOTS / 'ward-cart.yaml'}
        floor: {{far: {{line: [[50, 50], [51, 50]]}}}}
        step: {dt}
        duration: 14
        script: [{{at: 0, twist: {{omega: {w}}}}}]
    """)
    res = run_scenario(scen, keep=True)
    assert res.trace["theta"][-1] > 2 * math.pi
    assert np.max(np.hypot(res.trace["x"], res.trace["y"])) < 1e-12      # turning in place
    cl = clearance_along(scen.robot.outline, poses_of(res.trace), scen.floor, swept=True)
    r = math.hypot(WARD_L / 2, WARD_W / 2)
    band = SWEEP_TOLERANCE + r * (1 - math.cos(w * dt / 2))
    disc = shapely.Point(0, 0).buffer(r, quad_segs=256)
    sag_ref = r * (1 - math.cos(math.pi / 1024))
    assert math.pi * r * r - 2 * math.pi * r * band <= cl.swept_area <= math.pi * r * r
    assert shapely.hausdorff_distance(cl.swept.exterior, disc.exterior) <= band + sag_ref
    assert len(cl.swept.interiors) == 0


def test_swept_area_does_not_depend_on_how_rows_are_fed():
    out = np.array([(0.35, -0.25), (0.35, 0.25), (-0.35, 0.25), (-0.35, -0.25)])
    rng = np.random.default_rng(5)
    th = np.cumsum(rng.normal(0, 0.03, 2500))
    P = np.column_stack([np.cumsum(np.cos(th)) * 0.01, np.cumsum(np.sin(th)) * 0.01, th])
    t = np.arange(len(P)) * 0.01
    whole = ClearanceMeter(out, Floor((wall(0.6),)), swept=True)
    whole.add(t, P)
    bits = ClearanceMeter(out, Floor((wall(0.6),)), swept=True)
    i = 0
    while i < len(P):
        n = int(rng.integers(1, 30))
        bits.add(t[i:i + n], P[i:i + n])
        i += n
    assert whole.swept.wkb == bits.swept.wkb
    a, b = whole.result(), bits.result()
    assert a.features == b.features and a.first_contact == b.first_contact and a.contact_rows == b.contact_rows


@pytest.mark.parametrize("seed", [7, 8])
def test_pruned_distances_equal_every_row_measured(seed):
    # the meter measures exactly only the rows that can matter; against all rows x all features
    # measured with shapely.distance (and fed in uneven pieces), the results are the same
    from sim.runs.clearance import footprints, feature_geometry

    rng = np.random.default_rng(seed)
    m = 3000
    th = np.cumsum(rng.normal(0, 0.01, m))
    step = 0.004 * np.repeat(rng.choice([1.0, 1.0, -1.0, 0.3], m // 150 + 1), 150)[:m]
    P = np.column_stack([np.cumsum(np.cos(th) * step), np.cumsum(np.sin(th) * step), th])
    t = np.arange(m) * 0.01
    c = P[:, :2].mean(axis=0)
    feats = []
    for i in range(12):
        x, y = c + rng.uniform(-2.5, 2.5, 2)
        if i % 2:
            feats.append(Feature.polyline(f"l{i}", [(x, y), (x + rng.uniform(-1, 1), y + rng.uniform(-1, 1))], i))
        else:
            w, h = rng.uniform(0.05, 0.5, 2)
            feats.append(Feature.polygon(f"p{i}", [[(x, y), (x + w, y), (x + w, y + h), (x, y + h)]], i))
    floor = Floor(tuple(feats))
    out = np.array([(0.3, -0.2), (0.3, 0.2), (-0.3, 0.2), (-0.3, -0.2)])
    D = shapely.distance(footprints(out, P)[:, None], np.array([feature_geometry(f) for f in feats])[None, :])
    meter = ClearanceMeter(out, floor)
    i = 0
    while i < m:
        n = int(rng.integers(1, 700))
        meter.add(t[i:i + n], P[i:i + n])
        i += n
    res = meter.result()
    for j, n in enumerate(res.features):
        assert n.distance == D[:, j].min() and n.row == int(np.argmin(D[:, j]))
    touching = np.any(D == 0, axis=1)
    assert res.contact_rows == int(touching.sum()) > 0
    first = int(np.argmax(touching))
    assert res.first_contact.row == first and res.first_contact.index == int(np.argmax(D[first] == 0))


def _point_segment(p, a, b):
    """Distance from points p (n, 2) to segment a-b (2,) (common practice)."""
    ab = b - a
    L2 = float(ab @ ab)
    s = np.clip(((p - a) @ ab) / L2, 0.0, 1.0) if L2 > 0 else np.zeros(len(p))
    return np.hypot(*(p - (a + s[:, None] * ab)).T)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_sleeve_fit_keeps_every_vertex_within_the_tolerance_of_its_chords(seed):
    rng = np.random.default_rng(seed)
    m = 1500
    # smooth random driving (curvature a random walk) with some turning in place and reversing
    turn = np.cumsum(rng.normal(0, 0.0002, m))
    speed = 0.01 * np.repeat(rng.choice([1.0, 1.0, -1.0, 0.0], m // 100 + 1), 100)[:m]
    th = np.cumsum(turn + (speed == 0) * 0.02)
    P = np.column_stack([np.cumsum(np.cos(th) * speed), np.cumsum(np.sin(th) * speed), th])
    out = np.array([(0.4, -0.3), (0.4, 0.3), (-0.4, 0.3), (-0.4, -0.3)])
    V = world_vertices(out, P)
    tol = 2e-3
    k = V.shape[1]
    anchor = V[0].copy()
    cone = (np.zeros(k), np.zeros(k, dtype=np.bool_), np.zeros(k), np.zeros(k), np.zeros(k))
    kept = np.empty(m, dtype=np.int64)
    nk = sleeve_fit(V, tol, anchor, *cone, kept)
    ends = [0] + list(kept[:nk]) + [m - 1]
    assert ends == sorted(set(ends)) and 10 < len(ends) < m // 4
    for a, b in zip(ends[:-1], ends[1:]):
        for i in range(k):
            assert np.all(_point_segment(V[a:b + 1, i], V[a, i], V[b, i]) <= tol + 1e-12)


# --------------------------------------------------------------------------
# files: floors and footprints


def test_demo_floor_and_the_ward_cart_round_its_corner(cli):
    code, out, err = cli(["run", SCENARIOS / "ward-cart-side-corridor.yaml"])
    assert code == 0, out + err
    assert "PASS      no contact: none" in out
    # hand model in the scenario's description: the front right corner swings to
    # sqrt((R + W/2)^2 + (L/2)^2) from the turn centre, about 5.7 cm short of the outer wall
    R = 0.5 / (math.pi / 3)
    swing = math.hypot(R + WARD_W / 2, WARD_L / 2)
    assert abs(swing - 0.807) < 5e-4
    line = [ln for ln in out.splitlines() if "clearance above" in ln][0]
    got = float(line.split(": ")[1].split(" m to")[0])
    assert "'outer-wall'" in line and abs(got - (6.8 - 5.936 - swing)) < 0.005


def test_inline_and_yaml_floors_read_like_geojson(tmp_path, write_files):
    from sim.files.floorfile import load_floor
    from sim.files.scenario import load_scenario

    paths = write_files(tmp_path, {
        "f.geojson": geojson(feat("shelf", "Polygon", [[[0, 0], [1, 0], [1, 1], [0, 1], [0, 0]],
                                                       [[0.2, 0.2], [0.2, 0.4], [0.4, 0.4], [0.4, 0.2], [0.2, 0.2]]]),
                             feat("rail", "MultiLineString", [[[2, 0], [3, 0]], [[2, 1], [3, 1], [3, 2]]])),
        "f.yaml": """
            shelf: {polygon: [[0, 0], [1, 0], [1, 1], [0, 1]], holes: [[[0.2, 0.2], [0.2, 0.4], [0.4, 0.4], [0.4, 0.2]]]}
            rail: {line: [[2, 0], [3, 0]]}
        """,
        "s.yaml": f"""
            robot: {ROBOTS / 'ward-cart.yaml'}
            step: 0.1
            duration: 1
            script: [{{at: 0, stop: true}}]
            floor:
              shelf: {{polygon: [[0, 0], [1, 0], [1, 1], [0, 1], [0, 0]]}}
              rail: {{line: [[2, 0], [3, 0]]}}
        """})
    g, y = load_floor(paths["f.geojson"]), load_floor(paths["f.yaml"])
    inline = load_scenario(paths["s.yaml"]).floor
    for fl in (g, y, inline):
        assert [f.name for f in fl.features] == ["shelf", "rail"]
        assert [f.kind for f in fl.features] == ["polygon", "line"]
        np.testing.assert_array_equal(fl.features[0].parts[0][0], [[0, 0], [1, 0], [1, 1], [0, 1]])
    assert len(g.features[0].parts[0]) == 2 and len(g.features[1].parts) == 2
    assert [f.line for f in g.features] == [2, 3] and [f.line for f in y.features] == [2, 3]
    assert g.bounds() == (0.0, 3.0, 0.0, 2.0)


def test_footprint_polygon_in_the_robot_file(robot_from_yaml):
    # clockwise in the file: kept counter-clockwise; the bounding box gives length and width
    rb = robot_from_yaml("""
        footprint: {polygon: [[0.5, 0.3], [0.5, -0.3], [-0.4, -0.3], [-0.4, 0.3], [0.5, 0.3]]}
        wheels: [{name: w, type: fixed, x: 0, y: 0, radius: 0.1}]
    """)
    assert rb.outline.shape == (4, 2) and shapely.is_ccw(shapely.LinearRing(rb.outline))
    assert (rb.length, rb.width, rb.footprint_x, rb.footprint_y) == pytest.approx((0.9, 0.6, 0.05, 0.0))
    rect = robot_from_yaml("""
        footprint: {length: 0.8, width: 0.4, x: 0.1}
        wheels: [{name: w, type: fixed, x: 0, y: 0, radius: 0.1}]
    """)
    np.testing.assert_allclose(rect.outline, [[0.5, -0.2], [0.5, 0.2], [-0.3, 0.2], [-0.3, -0.2]], atol=1e-15)
    assert shapely.is_ccw(shapely.LinearRing(rect.outline))


BAD_FOOTPRINTS = [
    ("{polygon: [[0, 0], [1, 1], [1, 0], [0, 1]]}", "self-intersection at (0.5, 0.5)"),
    ("{polygon: [[0, 0], [1, 0]]}", "at least 3 distinct vertices"),
    ("{polygon: [[0, 0], [1, 0], [1, .nan]]}", "finite"),
    ("{polygon: [[0, 0], [1, 0], [1]]}", "[x, y]"),
    ("{polygon: [[0, 0], [1, 0], [1, 1]], width: 1}", "not both"),
]


@pytest.mark.parametrize("fp,fragment", BAD_FOOTPRINTS)
def test_bad_footprint_polygons(fp, fragment, tmp_path, write_files, cli, expect_input_error):
    paths = write_files(tmp_path, {"r.yaml": f"""
        name: r
        footprint: {fp}
        wheels: [{{name: w, type: fixed, x: 0, y: 0, radius: 0.1}}]
    """})
    code, out, err = cli(["analyze", paths["r.yaml"]])
    expect_input_error(code, err, paths["r.yaml"], 3, "footprint", fragment)


def _poly(*pts):
    return [list(map(list, pts)) + [list(pts[0])]]


OK_WALL = feat("wall", "LineString", [[0, 2], [5, 2]])
BAD_FLOORS = [
    # (file name, content, line, fragments)
    ("f.geojson", json.dumps({"type": "Feature", "geometry": None, "properties": {}}), 1,
     ("not a FeatureCollection", "RFC 7946")),
    ("f.geojson", "[]", 1, ("not a FeatureCollection", "an array")),
    ("f.geojson", geojson(OK_WALL, feat("bow", "Polygon", _poly((0, 0), (1, 1), (1, 0), (0, 1)))), 3,
     ("features[1] 'bow'", "self-intersection at (0.5, 0.5)", "must not cross")),
    ("f.geojson", geojson(feat("flat", "Polygon", [[0, 0], [1, 0], [1, 1], [0, 0]])), 2,
     ("features[0] 'flat'", "geometry.coordinates[0]", "wrong nesting")),
    ("f.geojson", geojson(OK_WALL, OK_WALL | {"properties": {"name": "w2"}},
                          feat("nan", "LineString", [[0, 0], [float("nan"), 1]])), 4,
     ("features[2] 'nan'", "geometry.coordinates[1][0]", "finite")),
    ("f.geojson", geojson(feat("post", "Point", [1, 1])), 2,
     ("features[0] 'post'", "\"Point\" is not allowed", "Polygon, MultiPolygon, LineString or MultiLineString")),
    ("f.geojson", geojson(feat("open", "Polygon", [[[0, 0], [1, 0], [1, 1], [0, 1]]])), 2,
     ("features[0] 'open'", "end where it starts")),
    ("f.geojson", geojson(OK_WALL, OK_WALL), 3, ("features[1]", "'wall' is already used by features[0]")),
    ("f.geojson", geojson({"type": "Feature", "properties": None, "geometry": None}), 2,
     ("features[0]", "no geometry")),
    ("f.geojson", '{"type": "FeatureCollection",\n "features": [\n  {"type": "Feature",,}]}', 3,
     ("malformed JSON",)),
    ("f.geojson", geojson(feat("hole-out", "Polygon", _poly((0, 0), (4, 0), (4, 4), (0, 4))
                               + _poly((5, 5), (6, 5), (6, 6)))), 2,
     ("features[0] 'hole-out'", "hole lies outside shell")),
    ("f.yaml", "shelf: {polygon: [[0, 0], [1, 1], [1, 0], [0, 1]]}\n", 1, ("shelf: the polygon", "self-intersection")),
    ("f.yaml", "a: {line: [[0, 0], [1, 1]]}\nrail: {line: [[0, 0]]}\n", 2, ("rail.line", "at least 2 points")),
    ("f.yaml", "zone: {circle: [0, 0]}\n", 1, ("unknown key 'circle'",)),
]


@pytest.mark.parametrize("name,content,line,fragments", BAD_FLOORS,
                         ids=[f"{i}-{c[0]}" for i, c in enumerate(BAD_FLOORS)])
def test_bad_floors(name, content, line, fragments, tmp_path, write_files, cli, expect_input_error):
    paths = write_files(tmp_path, {name: content, "s.yaml": f"""
        robot: {ROBOTS / 'ward-cart.yaml'}
        floor: {name}
        step: 0.1
        duration: 1
        script: [{{at: 0, stop: true}}]
        checks: [{{no_contact: true}}]
    """})
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    code, out, err = cli(["run", paths["s.yaml"], "--csv", out_dir / "t.csv"])
    expect_input_error(code, err, os.path.relpath(paths[name]), line, *fragments)
    assert out == "" and list(out_dir.iterdir()) == []


def test_scenario_floor_and_check_errors(tmp_path, write_files, cli, expect_input_error):
    base = f"robot: {ROBOTS / 'ward-cart.yaml'}\nstep: 0.1\nduration: 1\nscript: [{{at: 0, stop: true}}]\n"
    paths = write_files(tmp_path, {
        "nofloor.yaml": base + "checks:\n  - clearance_above: 0.1\n",
        "missing.yaml": base + "floor: nowhere.geojson\n",
        "false.yaml": base + "floor: {a: {line: [[0, 0], [1, 0]]}}\nchecks:\n  - no_contact: false\n",
        "neg.yaml": base + "floor: {a: {line: [[0, 0], [1, 0]]}}\nchecks:\n  - clearance_above: -1\n",
        "number.yaml": base + "floor: 3\n",
    })
    for name, line, frag in (("nofloor.yaml", 6, "needs a floor"), ("missing.yaml", 5, "not found"),
                             ("false.yaml", 7, "no_contact: true"), ("neg.yaml", 7, ">= 0"),
                             ("number.yaml", 5, "floor file path")):
        code, out, err = cli(["run", paths[name]])
        expect_input_error(code, err, paths[name], line, frag)


# --------------------------------------------------------------------------
# pictures


def test_plot_draws_the_floor_and_reports_the_run_clearance(tmp_path, write_files, cli, expect_input_error):
    floor = geojson(feat("end-wall", "LineString", [[1.3537, -3], [1.3537, 3]]),
                    feat("crate", "Polygon", _poly((0.5, 0.4), (1.0, 0.4), (1.0, 0.9), (0.5, 0.9))))
    paths = write_files(tmp_path, {"floor.geojson": floor, "plain.yaml": NO_RAMP_ROBOT, "s.yaml": """
        robot: plain.yaml
        floor: floor.geojson
        step: 0.01
        duration: 3
        script: [{at: 0, twist: {vx: 0.4}}]
        checks: [{clearance_above: 0.1}]
    """})
    csv = tmp_path / "t.csv"
    code, run_out, err = cli(["run", paths["s.yaml"], "--csv", csv])
    assert code == 1, err                              # it drives into the wall
    png = tmp_path / "p.png"
    code, out, err = cli(["plot", csv, "-o", png, "--floor", paths["floor.geojson"], "--robot", paths["plain.yaml"]])
    assert code == 0, err
    assert png.stat().st_size > 10_000
    # the same nearest approach and first contact, measured on the read-back trace and on the run
    plotted = re.search(r"smallest clearance (\S+) m to '(\S+)' at t=(\S+) s", out)
    checked = re.search(r"clearance above 0.1 m: (\S+) m to '(\S+)' smallest at t=(\S+) s", run_out)
    assert plotted and checked and plotted.groups() == checked.groups() == ("0", "end-wall", "2.51"), (out, run_out)
    hit = re.search(r"first contact with 'end-wall' at t=2.51 s at \(1.354, (\S+)\) m", out)
    assert hit and hit.group(0).split(" m")[0] in run_out
    code, out, err = cli(["plot", csv, "-o", tmp_path / "q.png", "--floor", paths["floor.geojson"]])
    expect_input_error(code, err, "--floor", None, "--robot")
    assert not (tmp_path / "q.png").exists()


def test_pictures_show_floor_swept_area_closest_pair_and_contact(tmp_path, scenario_from_yaml, cli):
    os.environ["SDL_VIDEODRIVER"] = "dummy"
    from sim.view import render
    from sim.view.render import PALETTE, PANEL_W, Renderer, to_array

    D, v = 1.0037, 0.4
    floor = geojson(feat("end-wall", "LineString", [[0.35 + D, -3], [0.35 + D, 3]]),
                    feat("crate", "Polygon", _poly((0.5, 0.6), (1.0, 0.6), (1.0, 0.9), (0.5, 0.9))))
    body = f"""
        robot: plain.yaml
        floor: floor.geojson
        step: 0.01
        duration: 3
        script: [{{at: 0, twist: {{vx: {v}}}}}]
    """
    scen = scenario(tmp_path, scenario_from_yaml, body, floor)
    rows = []
    run_scenario(scen, on_row=rows.append)
    rd = Renderer(scen.robot, (1120, 720), "t", floor=scen.floor)
    for r in rows:
        rd.observe(r)
    rd.fit()
    img = to_array(rd.draw(rows[-1]))
    px = lambda x, y: tuple(int(round(float(c))) for c in rd.view.to_screen(x, y))

    def colour_at(x, y, colour, r=2):
        u, w = px(x, y)
        patch = img[w - r:w + r + 1, u - r:u + r + 1]
        return bool(np.any(np.all(patch == np.array(colour[:3], np.uint8), axis=-1)))

    assert colour_at(0.35 + D, -0.8, PALETTE["floor_edge"])           # the wall line
    assert colour_at(0.75, 0.75, PALETTE["floor_fill"])                # inside the crate
    # swept but no longer under the base: the translucent blue over the paper
    u, w = px(-0.273, 0.137)
    paper, blue = np.array(PALETTE["paper"]), np.array(PALETTE["swept"][:3])
    want = paper + (blue - paper) * PALETTE["swept"][3] / 255
    assert np.all(np.abs(img[w, u].astype(float) - want) <= 2), (img[w, u], want)
    # the base is through the wall: its outline is in the warning colour, the first contact marked
    assert colour_at(rows[-1].pose[0] - 0.35, 0.25, PALETTE["skid"])
    hit = rd.clearance().first_contact()
    assert colour_at(*hit.point, PALETTE["skid"], r=4)
    # the same picture from the command, and its last frame
    code, out, err = cli(["run", tmp_path / "s.yaml", "--png", tmp_path / "end.png",
                          "--frames", tmp_path / "frames", "--fps", "2"])
    assert code == 0, err
    load = lambda p: to_array(render._pg().image.load(str(p)))
    last = sorted((tmp_path / "frames").iterdir())[-1]
    assert np.array_equal(load(tmp_path / "end.png"), load(last))
    assert np.array_equal(load(tmp_path / "end.png")[:, PANEL_W:], img[:, PANEL_W:])   # the panel's title differs
    assert "floor     2 features; add a check" in out
