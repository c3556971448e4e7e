"""Routes: the route file, the fastest time along a route, and closed-loop tracking.

Checked against closed forms (each source named beside it), against scipy's linear
programming solver for the speed profile, and against the project's own SE(2)
exponential for the tracking feedforward.
"""
from __future__ import annotations

import json
import math
import os

import numpy as np
import pytest

from sim.files.robotfile import load_robot
from sim.model.route import Route
from sim.theory.speedplan import motion_of, plan_route, trapezoid_time

from conftest import ROBOTS

CART = load_robot(ROBOTS / "ward-cart.yaml")          # r 0.08 m, track 0.44 m, 25 rad/s, 60 rad/s^2
TOTE = load_robot(ROBOTS / "tote-mecanum.yaml")       # r 0.05 m, rollers 45 deg, 30 rad/s, 80 rad/s^2
QUAD = load_robot(ROBOTS / "quad-steer.yaml")         # r 0.075 m, 20 rad/s, 40 rad/s^2, 3 rad/s steering


def route(points, radius=0.0, headings=None, speed=math.inf):
    return Route("t", points, tuple(headings or (None,) * len(points)), radius, speed)


def L_route(side=2.0):
    return route([[0, 0], [side, 0], [side, side]])


# -- closed forms ---------------------------------------------------------------------------
@pytest.mark.parametrize("L", [3.0, 0.5])
def test_straight_route_is_a_trapezoid(L):
    # Kinematics of a trapezoidal profile (common practice): from rest to rest over L at most
    # v and a, the time is L/v + v/a when L >= v^2/a (it reaches v), else 2 sqrt(L/a).
    # Differential drive going straight: every wheel at v / r, so v = r max_spin, a = r max_spin_accel.
    v, a = 0.08 * 25, 0.08 * 60
    expect = L / v + v / a if L >= v * v / a else 2 * math.sqrt(L / a)
    p = plan_route(CART, route([[0, 0], [L, 0]]), ds=1e-3)
    assert p.feasible and p.turn_time == 0 and p.resteer_time == 0
    assert p.time == pytest.approx(expect, rel=1e-5)
    assert max(p.profile) == pytest.approx(min(v, math.sqrt(L * a)), rel=1e-6)
    assert p.legs[0]["limit"] == ("left max_spin" if L >= v * v / a else "left max_spin_accel")
    # the route's speed cap takes over from max_spin.  The planner's acceleration is constant
    # between samples (1 mm here): where the exact profile switches from accelerating to
    # cruising inside an interval, that interval costs a little more, at most about ds / v.
    capped = plan_route(CART, route([[0, 0], [L, 0]], speed=0.3), ds=1e-3)
    assert capped.time == pytest.approx(L / 0.3 + 0.3 / a, abs=2 * 1e-3 / 0.3)
    assert capped.time >= L / 0.3 + 0.3 / a - 1e-12


@pytest.mark.parametrize("R", [0.5, 2.0])
def test_circle_speed_is_set_by_the_outer_wheel(R):
    # A differential base turning on radius R (path of the axle's middle): the outer wheel runs
    # on R + b/2, so its speed is v (1 + b / (2R)) and v = r max_spin / (1 + b / (2R))
    # (rigid-body rotation about the ICR, common practice).  A square of side 2R with corners
    # rounded to R is exactly a circle of radius R.
    r, b = 0.08, 0.44
    p = plan_route(CART, route([[0, -R], [R, -R], [R, R], [-R, R], [-R, -R], [0, -R]], radius=R))
    assert p.feasible
    assert np.max(np.abs(np.hypot(*p.path.xy.T) - R)) < 1e-12
    v = r * 25 / (1 + b / (2 * R))
    assert max(p.profile) == pytest.approx(v, rel=1e-9)
    assert p.peak_spin["right"] == pytest.approx(25.0, rel=1e-9)            # outer wheel (left turns)
    assert p.peak_spin["left"] == pytest.approx(25.0 * (1 - b / (2 * R)) / (1 + b / (2 * R)), rel=1e-9)
    assert {leg["limit"] for leg in p.legs[1:-1]} == {"right max_spin"}      # between speeding up and braking


def test_sharp_corner_each_base_in_its_own_way():
    # 90 deg corner, two legs of 2 m.  Each leg alone is a straight route (trapezoid above).
    L = 2.0
    leg = lambda v, a: L / v + v / a if L >= v * v / a else 2 * math.sqrt(L / a)
    cart, tote, quad = (plan_route(b, L_route(L), ds=1e-3) for b in (CART, TOTE, QUAD))
    # mecanum tote: stops and leaves sideways at once.  A wheel with rollers at g = +-45 deg spins at
    # (cos g, sin g) . (vx, vy) / (r cos g): |spin| = v / r both forward and sideways (Swedish
    # wheel rolling constraint, Siegwart et al. 2011), so v = r max_spin, a = r max_spin_accel.
    assert tote.time == pytest.approx(2 * leg(0.05 * 30, 0.05 * 80), rel=1e-5)
    assert tote.turn_time == 0 and tote.resteer_time == 0
    corner = np.flatnonzero(tote.path.turn)[0]
    assert tote.profile[corner] == 0 and tote.profile[corner + 1] == 0
    # quad-steer: the same two legs plus (pi/2) / max_steer_rate of re-steering, base at rest
    assert quad.resteer_time == pytest.approx((math.pi / 2) / 3.0, rel=1e-12)
    assert quad.time == pytest.approx(2 * leg(0.075 * 20, 0.075 * 40) + (math.pi / 2) / 3.0, rel=1e-5)
    # differential cart: plus the turn in place, trapezoidal in omega under the wheel limits:
    # omega_max = r max_spin / (b/2), alpha = r max_spin_accel / (b/2)
    w, al = 0.08 * 25 / 0.22, 0.08 * 60 / 0.22
    turn = 2 * math.sqrt((math.pi / 2) / al) if math.pi / 2 < w * w / al else (math.pi / 2) / w + w / al
    assert cart.turn_time == pytest.approx(turn, rel=1e-12)
    assert trapezoid_time(math.pi / 2, w, al) == pytest.approx(turn, rel=1e-15)
    assert cart.time == pytest.approx(2 * leg(0.08 * 25, 0.08 * 60) + turn, rel=1e-5)
    # the plan's motion: the cart stands on the corner while its heading turns 90 deg
    at_corner = np.hypot(cart.pose[:, 0] - L, cart.pose[:, 1]) < 1e-12
    assert np.ptp(cart.pose[at_corner, 2]) == pytest.approx(math.pi / 2, abs=1e-12)
    assert np.ptp(tote.pose[:, 2]) == 0 and np.ptp(quad.pose[:, 2]) == 0   # both keep their heading


def _tricycle(L, limit_deg, robot_from_yaml, track=None):
    """Car-like base: driven fixed rear axle at x = 0, steered front wheel(s) at x = L."""
    front = (f"""  - {{name: fl, type: steered, x: {L}, y: {track / 2}, radius: 0.15, driven: false,
     steer_limits: [-{limit_deg} deg, {limit_deg} deg], max_steer_rate: 1.5}}
  - {{name: fr, type: steered, x: {L}, y: {-track / 2}, radius: 0.15, driven: false,
     steer_limits: [-{limit_deg} deg, {limit_deg} deg], max_steer_rate: 1.5}}""" if track else
             f"""  - {{name: front, type: steered, x: {L}, y: 0, radius: 0.15, driven: false,
     steer_limits: [-{limit_deg} deg, {limit_deg} deg], max_steer_rate: 1.5}}""")
    return robot_from_yaml(f"""
wheels:
  - {{name: rl, type: fixed, x: 0, y: 0.3, radius: 0.15, max_spin: 12, max_spin_accel: 20}}
  - {{name: rr, type: fixed, x: 0, y: -0.3, radius: 0.15, max_spin: 12, max_spin_accel: 20}}
{front}
""")


@pytest.mark.parametrize("track", [None, 0.6])
def test_car_like_base_refuses_corners_tighter_than_it_can_steer(track, robot_from_yaml):
    # Car-like steering geometry (common practice): a front wheel at wheelbase L steered by beta
    # turns the rear axle's middle on R = L / tan(beta); with two front wheels the inner one
    # sits h = track / 2 nearer the centre, so R_min = h + L / tan(beta_max).
    L, lim = 0.8, 40.0
    base = _tricycle(L, lim, robot_from_yaml, track)
    r_min = (track or 0) / 2 + L / math.tan(math.radians(lim))
    corner = [[0, 0], [4, 0], [4, 4]]
    tight = plan_route(base, route(corner, radius=0.99 * r_min))
    assert not tight.feasible and "tighter than" in tight.reason and tight.waypoint == 1
    assert f"{r_min:.3f} m" in tight.reason
    sharp = plan_route(base, route(corner))
    assert not sharp.feasible and "cannot turn in place" in sharp.reason and f"{r_min:.3f}" in sharp.reason
    ok = plan_route(base, route(corner, radius=1.01 * r_min))
    assert ok.feasible and ok.turn_time == 0
    # it stops twice to re-steer: onto the arc and off it; the slower (inner) wheel sets the time
    beta_in = math.atan(L / (1.01 * r_min - (track or 0) / 2))
    assert ok.resteer_time == pytest.approx(2 * beta_in / 1.5, rel=1e-9)
    assert len(ok.stops) == 2


def test_route_heading_a_base_cannot_hold(robot_from_yaml):
    # the cart faces along its path: 45 deg at the corner of an L is not one of its headings there
    bad = plan_route(CART, route([[0, 0], [2, 0], [2, 2]], headings=[None, math.radians(-45), None]))
    assert not bad.feasible and "cannot hold" in bad.reason and bad.waypoint == 1
    # between the arriving and leaving directions it is (it turns in place through it)
    assert plan_route(CART, route([[0, 0], [2, 0], [2, 2]], headings=[None, math.radians(45), None])).feasible
    # a heading at the end: a final turn in place for the cart, a gradual turn for the tote
    end = route([[0, 0], [2, 0]], headings=[None, math.pi / 2])
    c, t = plan_route(CART, end), plan_route(TOTE, end)
    assert c.turn_time > 0 and c.pose[-1, 2] == pytest.approx(math.pi / 2)
    assert t.turn_time == 0 and t.pose[-1, 2] == pytest.approx(math.pi / 2)
    skid = load_robot(ROBOTS / "field-rover.yaml")
    p = plan_route(skid, end)
    assert not p.feasible and "one motion" in p.reason


# -- the speed profile against a linear program -----------------------------------------------
@pytest.mark.parametrize("base", ["tote", "cart"])
def test_speed_profile_matches_scipy_linprog(base, textbook):
    # The discretised problem (x = v^2 at the samples, u = dv/dt constant between them):
    #   x_j+1 = x_j + 2 ds_j u_j,  x at rest at both ends,  J_i^2 x_j <= max_spin^2,
    #   |J_i' x_j + J_i u_j| <= max_spin_accel,
    # solved by scipy's HiGHS linear programming (maximise sum x) must give the planner's profile:
    # the time-optimal profile is the largest x at every sample.  J_i is written out here from
    # the textbook rolling rows (Siegwart et al. 2011), independently of sim.theory.
    from scipy.optimize import linprog
    from scipy.sparse import lil_matrix

    robot = TOTE if base == "tote" else CART
    rt = route([[0, 0], [1.2, 0], [1.2, 1.2]], radius=0.5)
    p = plan_route(robot, rt, ds=0.01)
    S = p.path
    psi, kap = S.tangent, S.curvature
    if base == "tote":      # heading held at 0: unit twist (cos psi, sin psi, 0)
        xi = np.stack([np.cos(psi), np.sin(psi), 0 * psi], 1)
        dxi = np.stack([-kap * np.sin(psi), kap * np.cos(psi), 0 * psi], 1)
    else:                   # faces its path: (1, 0, kappa), constant on each piece
        xi = np.stack([1 + 0 * psi, 0 * psi, kap], 1)
        dxi = np.zeros_like(xi)
    J, dJ, wmax, amax = [], [], [], []
    for w in robot.wheels:
        if not w.driven:
            continue
        row = textbook.rolling(w.x, w.y, w.heading, w.roller)
        # textbook rows act on R(theta) xi (world); ours on the body twist: theta = 0 frame
        k = w.radius * math.cos(w.roller)
        J.append(xi @ row / k)
        dJ.append(dxi @ row / k)
        wmax.append(w.max_spin)
        amax.append(w.max_spin_accel)
    J, dJ = np.array(J).T, np.array(dJ).T
    m = len(S)
    ds = np.diff(S.s)
    nv = 2 * m - 1                   # x_0..x_m-1, u_0..u_m-2
    A_eq = lil_matrix((m - 1 + 2, nv))
    for j in range(m - 1):
        A_eq[j, j + 1], A_eq[j, j] = 1.0, -1.0
        A_eq[j, m + j] = -2 * ds[j]
    A_eq[m - 1, 0] = 1.0
    A_eq[m, m - 1] = 1.0
    rows, b = [], []
    for j in range(m - 1):
        if ds[j] == 0:
            continue
        for i in range(J.shape[1]):
            for sgn in (1.0, -1.0):
                r = np.zeros(nv)
                r[j], r[m + j] = sgn * dJ[j, i], sgn * J[j, i]
                rows.append(r)
                b.append(amax[i])
    bounds = [(0.0, float(np.min([(wm / abs(jj)) ** 2 if abs(jj) > 1e-12 else np.inf
                                  for wm, jj in zip(wmax, J[j])]))) for j in range(m)]
    bounds += [(None, None)] * (m - 1)
    res = linprog(-np.concatenate([np.ones(m), np.zeros(m - 1)]), A_ub=np.array(rows), b_ub=b,
                  A_eq=A_eq.tocsr(), b_eq=np.zeros(m + 1), bounds=bounds, method="highs")
    assert res.status == 0
    v_lp = np.sqrt(np.maximum(res.x[:m], 0.0))
    assert np.max(np.abs(v_lp - p.profile)) < 1e-6
    assert np.max(p.profile) > 0.3


# -- tracking -----------------------------------------------------------------------------------
def test_feedforward_is_the_se2_logarithm():
    # Two plan rows a constant twist apart (the project's exact SE(2) exponential, sim.theory.se2):
    # the feedforward over that step must give the twist back.
    from sim.engine.tracking import feedforward
    from sim.theory.se2 import step_pose

    rng = np.random.default_rng(15)
    for _ in range(20):
        tw = rng.normal(size=3) * (1.0, 1.0, 2.0)
        dt = 0.02
        p0 = rng.normal(size=3)
        p1 = step_pose(p0, tw, dt)
        out = np.empty(3)
        speed = np.full(2, 1.0)
        feedforward(np.array([0.0, dt]), np.stack([p0, p1]), speed, 0.0, dt, out)
        np.testing.assert_allclose(out, tw, rtol=1e-9, atol=1e-9)


def test_kanayama_law_as_published():
    # Kanayama et al. 1990: errors in the robot frame, v = vr cos eth + kx ex,
    # w = wr + vr (ky ey + kth sin eth); plus our k_turn sin eth (here 0 to compare).
    from sim.engine.tracking import kanayama_law

    pose = np.array([0.3, -0.2, 0.4])
    ref = np.array([0.5, 0.1, 0.7])
    ff = np.array([0.8, 0.0, 0.3])
    g = np.array([2.0, 30.0, 9.0, 0.0])
    out = np.empty(3)
    kanayama_law(pose, ref, ff, g, np.zeros(3), out)
    c, s = math.cos(pose[2]), math.sin(pose[2])
    ex = c * (ref[0] - pose[0]) + s * (ref[1] - pose[1])
    ey = -s * (ref[0] - pose[0]) + c * (ref[1] - pose[1])
    eth = ref[2] - pose[2]
    v = 0.8 * math.cos(eth) + 2.0 * ex
    w = 0.3 + 0.8 * (30.0 * ey + 9.0 * math.sin(eth))
    np.testing.assert_allclose(out, [v, 0.0, w], atol=1e-12)


def _scenario(tmp_path, scenario_from_yaml, text):
    import shutil
    shutil.copytree(ROBOTS, tmp_path / "robots", dirs_exist_ok=True)
    return scenario_from_yaml(tmp_path, text)


def test_differential_base_settles_on_a_circle(tmp_path, scenario_from_yaml):
    from sim.runs.runner import run_scenario

    scen = _scenario(tmp_path, scenario_from_yaml, """
        robot: robots/ward-cart.yaml
        step: 0.02
        duration: 8
        start: {x: 0.03, y: -2.02, theta: 3 deg}     # off the route: 3.6 cm and 3 deg
        controller: {headroom: 0.05}                 # plan at 95 % of the limits: room for feedback
        route:
          corner_radius: 2
          waypoints: [[0, -2], [2, -2], [2, 2], [-2, 2], [-2, -2], [0, -2]]
        checks:
          - tracking_error_below: 0.005
            after: 2.5
    """)
    res = run_scenario(scen, keep=True)
    tr = res.trace
    assert tr["track_error"][0] > 0.019                       # started off the path
    settled = tr["t"] >= 2.5
    assert np.max(tr["track_error"][settled]) < 0.005, np.max(tr["track_error"][settled])
    assert res.passed
    # cruising with the outer wheel at 95 % of max_spin, the rest used to correct
    cruise = (tr["t"] > 3) & (tr["t"] < 6)
    assert np.median(np.abs(tr["right.spin"][cruise])) == pytest.approx(0.95 * 25.0, rel=2e-3)


@pytest.mark.parametrize("name,robot", [("cart", "ward-cart"), ("tote", "tote-mecanum"), ("quad", "quad-steer")])
def test_route_report_agrees_with_the_closed_loop_arrival(name, robot, tmp_path, scenario_from_yaml):
    # The same L route planned (trundle route) and driven under control: arrival within 2 %.
    from sim.runs.runner import run_scenario

    scen = _scenario(tmp_path, scenario_from_yaml, f"""
        robot: robots/{robot}.yaml
        step: 0.02
        duration: 8
        route:
          waypoints: [[0, 0], [2, 0], [2, 2]]
          tolerance: {{position: 0.01, heading: 1 deg}}
        checks:
          - arrive_within: 8
          - at: end
            pose: {{x: 2, y: 2}}
            tolerance: {{position: 0.01}}
    """)
    plan = plan_route(load_robot(ROBOTS / f"{robot}.yaml"), L_route(2.0))
    res = run_scenario(scen, keep=True)
    arrival = res.tracking["arrival"][(0.01, math.radians(1))]
    assert arrival is not None and abs(arrival - plan.time) / plan.time < 0.02, (arrival, plan.time)
    assert res.passed, [c.text for c in res.checks]
    for col in ("ref_x", "ref_y", "ref_theta", "track_error"):
        assert col in res.trace
    assert np.max(res.trace["track_error"]) < 1e-3


def test_quad_steer_reaches_the_end_of_an_L_route(tmp_path, scenario_from_yaml):
    from sim.runs.runner import run_scenario

    scen = _scenario(tmp_path, scenario_from_yaml, """
        robot: robots/quad-steer.yaml
        step: 0.02
        duration: 7
        start: {x: 0.02, y: -0.01}              # 2 cm off the start
        controller: {headroom: 0.05}
        route: {waypoints: [[0, 0], [3, 0], [3, 2]]}
    """)
    res = run_scenario(scen, keep=True)
    x, y, th = res.final_pose
    assert math.hypot(x - 3, y - 2) < 0.01 and abs(th) < math.radians(0.5)
    # it waited at the corner while its modules turned: wheels at rest, steering moving
    tr = res.trace
    still = (np.abs(tr["front_left.spin"]) < 1e-12) & (tr["t"] > 1) & (tr["t"] < 5)
    assert np.ptp(tr["front_left.steer"][still]) > math.radians(80)


def test_tote_drives_a_square_while_turning(tmp_path, scenario_from_yaml):
    from sim.runs.runner import run_scenario

    scen = _scenario(tmp_path, scenario_from_yaml, """
        robot: robots/tote-mecanum.yaml
        step: 0.02
        duration: 11
        route:
          waypoints: [[0, 0, 0 deg], [2, 0, 90 deg], [2, 2, 180 deg], [0, 2, 270 deg], [0, 0, 360 deg]]
        checks:
          - at: end
            pose: {x: 0, y: 0, theta: 360 deg}
            tolerance: {position: 0.01, heading: 0.5 deg}
    """)
    res = run_scenario(scen, keep=True)
    assert res.passed, [c.text for c in res.checks]
    th = res.trace["theta"]
    moving = np.hypot(res.trace["vx"], res.trace["vy"]) > 0.05
    assert np.all(np.diff(th) >= -1e-12)                          # never turns back
    assert np.all(np.abs(res.trace["omega"][moving]) > 0.05)      # turns while it drives
    assert th[-1] == pytest.approx(2 * math.pi, abs=math.radians(0.5))


def test_goto_and_world_frame_twists(tmp_path, scenario_from_yaml):
    from sim.runs.runner import run_scenario

    scen = _scenario(tmp_path, scenario_from_yaml, """
        robot: robots/tote-mecanum.yaml
        step: 0.02
        duration: 6
        start: {theta: 90 deg}
        script:
          - {at: 0, twist: {vx: 0.3, omega: 1.0, frame: world}}   # straight along world x while spinning
          - {at: 2, goto: {x: 0.5, y: 0.5, theta: 0 deg}}
        checks:
          - arrive_within: 6
            tolerance: {position: 0.005, heading: 0.5 deg}
    """)
    res = run_scenario(scen, keep=True)
    tr = res.trace
    first = tr["t"] < 2 - 1e-9
    # the world-frame twist: once the wheels are up to speed, no sideways drift at all (the
    # first steps' ramp under max_spin_accel turns the base less than asked, a few 0.1 mm)
    steady = first & (tr["t"] > 0.3)
    assert np.ptp(tr["y"][steady]) < 1e-12 and np.max(np.abs(tr["y"][first])) < 1e-3
    assert tr["theta"][first][-1] > 1.5 + math.pi / 2            # while it turned ~2 rad
    assert np.all(np.isnan(tr["ref_x"][first])) and np.all(np.isfinite(tr["ref_x"][~first]))
    assert res.passed, [c.text for c in res.checks]
    x, y, th = res.final_pose
    assert math.hypot(x - 0.5, y - 0.5) < 0.005


# -- files and command line ------------------------------------------------------------------------
BAD_ROUTES = [
    ("one waypoint", "waypoints:\n  - [0, 0]\n", 1, "at least 2 waypoints"),
    ("repeated waypoint", "waypoints:\n  - [0, 0]\n  - [1, 2]\n  - [1, 2]\n", 4, "repeats waypoint 1"),
    ("not a number", "waypoints:\n  - [0, 0]\n  - [.nan, 2]\n", 3, "finite number"),
    ("misspelt key", "waypoints:\n  - [0, 0]\n  - [1, 0]\ncorner_raduis: 0.2\n", 4, "did you mean 'corner_radius'"),
    ("bad heading", "waypoints:\n  - [0, 0]\n  - [1, 0, 90 dg]\n", 3, "90 dg"),
    ("radius too big", "waypoints:\n  - [0, 0]\n  - [1, 0]\n  - [1, 1]\ncorner_radius: 1.2\n", 3, "does not fit"),
    ("negative speed", "waypoints:\n  - [0, 0]\n  - [1, 0]\nspeed: -1\n", 4, "must be > 0"),
]


@pytest.mark.parametrize("what,text,line,frag", BAD_ROUTES, ids=[b[0] for b in BAD_ROUTES])
def test_bad_routes(what, text, line, frag, tmp_path, cli, expect_input_error):
    f = tmp_path / "r.yaml"
    f.write_text(text)
    code, out, err = cli(["route", f, ROBOTS / "ward-cart.yaml"])
    expect_input_error(code, err, f, line, frag)
    assert out == ""


def test_trundle_route_table_json_and_plot(tmp_path, cli, repo_root):
    rt = repo_root / "scenarios" / "routes" / "ward-corridor.yaml"
    bases = [ROBOTS / f"{b}.yaml" for b in ("ward-cart", "tote-mecanum", "quad-steer")]
    code, out, _ = cli(["route", rt, *bases, "--plot", tmp_path / "r.png"])
    assert code == 0
    assert "fastest   tote-mecanum" in out and "re-steer 0.524 s" in out
    assert (tmp_path / "r.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    code, out, _ = cli(["route", rt, *bases, ROBOTS / "greenhouse-rover.yaml", "--json"])
    assert code == 1
    rows = json.loads(out)
    assert [r["robot"] for r in rows] == ["ward-cart", "tote-mecanum", "quad-steer", "greenhouse-rover"]
    for r in rows:
        assert {"robot", "feasible", "time", "resteer_time", "reason"} <= r.keys()
    assert rows[3]["feasible"] is False and rows[3]["time"] is None and "turn in place" in rows[3]["reason"]
    assert rows[2]["resteer_time"] == pytest.approx(3 * (math.pi / 2) / 3.0, abs=1e-6)
    assert all(r["reason"] is None for r in rows[:3])


def test_scenario_route_errors(tmp_path, write_files, cli, expect_input_error):
    import shutil
    shutil.copytree(ROBOTS, tmp_path / "robots")
    files = write_files(tmp_path, {
        "both.yaml": "robot: robots/ward-cart.yaml\nstep: 0.1\nduration: 1\nroute: {waypoints: [[0, 0], [1, 0]]}\n"
                     "script:\n  - {at: 0, stop: true}\n",
        "car.yaml": "robot: robots/greenhouse-rover.yaml\nstep: 0.1\nduration: 1\nroute: r.yaml\n",
        "r.yaml": "waypoints:\n  - [0, 0]\n  - [3, 0]\n  - [3, 3]\n",
        "gain.yaml": "robot: robots/ward-cart.yaml\nstep: 0.1\nduration: 1\nroute: r.yaml\n"
                     "controller: {k_position: 2}\n",
        "arrive.yaml": "robot: robots/ward-cart.yaml\nstep: 0.1\nduration: 1\nscript:\n  - {at: 0, stop: true}\n"
                       "checks:\n  - arrive_within: 3\n",
        "frame.yaml": "robot: robots/ward-cart.yaml\nstep: 0.1\nduration: 1\nscript:\n"
                      "  - {at: 0, twist: {vx: 1, frame: map}}\n",
        "goal.yaml": "robot: robots/greenhouse-rover.yaml\nstep: 0.1\nduration: 3\nscript:\n"
                     "  - {at: 0, twist: {vx: 0.5}}\n  - {at: 1, goto: {x: 0.5, y: 2}}\n",
    })
    code, _, err = cli(["run", files["both.yaml"]])
    expect_input_error(code, err, files["both.yaml"], 1, "'script' and 'route'")
    code, _, err = cli(["run", files["car.yaml"]])
    expect_input_error(code, err, os.path.relpath(files["r.yaml"]), 3, "cannot turn in place")
    code, _, err = cli(["run", files["gain.yaml"]])
    expect_input_error(code, err, files["gain.yaml"], 5, "unknown key 'k_position'", "k_x")
    code, _, err = cli(["run", files["arrive.yaml"]])
    expect_input_error(code, err, files["arrive.yaml"], 7, "needs a 'route'")
    code, _, err = cli(["run", files["frame.yaml"]])
    expect_input_error(code, err, files["frame.yaml"], 5, "body, world")
    # a goal the base cannot reach from where it is: found when the entry starts; no trace is left
    code, _, err = cli(["run", files["goal.yaml"], "--csv", tmp_path / "g.csv"])
    expect_input_error(code, err, files["goal.yaml"], 6, "goto (0.5, 2)", "cannot turn in place")
    assert not (tmp_path / "g.csv").exists() and not (tmp_path / "g.csv.part").exists()


def test_motion_of_bundled_bases():
    kinds = {n: motion_of(load_robot(ROBOTS / f"{n}.yaml")) for n in
             ("ward-cart", "tote-mecanum", "quad-steer", "greenhouse-rover", "pallet-tug", "camera-dolly")}
    assert {n: (m.kind, m.law) for n, m in kinds.items()} == {
        "ward-cart": ("line", "kanayama"), "tote-mecanum": ("free", "omni"), "quad-steer": ("free", "steered"),
        "greenhouse-rover": ("line", "kanayama"), "pallet-tug": ("line", "kanayama"),
        "camera-dolly": ("free", "omni")}
    assert kinds["ward-cart"].guide == (0.0, 0.0, 0.0)


def test_route_floor_reports_clearance_along_each_plan(cli):
    # The side-corridor route in the ward corridor floor: the tote (omnidirectional, heading held)
    # reaches the corner at x = 6.4 m with its front edge L/2 ahead of its origin; the outer wall
    # is at x = 6.8 m, so its smallest clearance is 0.4 - L/2 (plane geometry).  The ward cart
    # turns in place there and its corners sweep into that wall: a contact.
    root = ROBOTS.parent
    tote = load_robot(root / "robots" / "tote-mecanum.yaml")
    code, out, err = cli(["route", str(root / "routes" / "side-corridor.yaml"), str(root / "robots" / "tote-mecanum.yaml"),
                          str(root / "robots" / "ward-cart.yaml"), "--floor", str(root / "floors" / "ward-corridor.geojson"),
                          "--json"])
    assert code == 0, err
    got = {d["robot"]: d["clearance"] for d in json.loads(out)}
    c = got[tote.name]
    assert c["feature"] == "outer-wall" and c["contact"] is None
    assert c["distance"] == pytest.approx(0.4 - tote.length / 2, abs=1e-6)
    cart = got["ward-cart"]
    assert cart["distance"] == 0.0 and cart["contact"]["feature"] == "outer-wall"
