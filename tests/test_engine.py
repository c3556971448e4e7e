"""The fixed-step engine against closed forms, scipy's ODE solver and textbook geometry."""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from hypothesis import given, settings
from hypothesis import strategies as st

from sim import Simulator
from sim.runs.runner import run_scenario, summary_text


R_WHEEL, TRACK = 0.08, 0.44
DIFF = f"""
    wheels:
      - {{name: left, type: fixed, x: 0.0, y: {TRACK / 2}, radius: {R_WHEEL}}}
      - {{name: right, type: fixed, x: 0.0, y: {-TRACK / 2}, radius: {R_WHEEL}}}
      - {{name: castor, type: castor, x: 0.3, y: 0.0, radius: 0.04, trail: 0.03}}
"""


def diff_twist(wl, wr):
    """Differential drive (common practice): v = r (wR + wL) / 2, omega = r (wR - wL) / b."""
    return R_WHEEL * (wr + wl) / 2, R_WHEEL * (wr - wl) / TRACK


def unicycle(t, s, v, w):
    """The unicycle ODE x' = v cos(theta), y' = v sin(theta), theta' = omega."""
    return [v * math.cos(s[2]), v * math.sin(s[2]), w]


def test_diff_drive_constant_spins_closed_form_arc(robot_from_yaml):
    robot = robot_from_yaml(DIFF)
    wl, wr = 4.0, 5.0
    v, w = diff_twist(wl, wr)
    sim = Simulator(robot, step=0.01)
    for _ in range(1000):
        sim.step(wheels={"left": wl, "right": wr})
    T = 10.0
    # closed-form arc of radius v / omega (common practice)
    want = [v / w * math.sin(w * T), v / w * (1 - math.cos(w * T)), w * T]
    assert sim.t == pytest.approx(T)
    np.testing.assert_allclose(sim.pose, want, rtol=0, atol=1e-9)


def test_diff_drive_matches_solve_ivp(robot_from_yaml, scenario_from_yaml, tmp_path):
    # Piecewise-constant wheel spins (a script), integrated segment by segment with
    # scipy.integrate.solve_ivp (RK45, tight tolerances) on the unicycle ODE.
    segments = [(0.0, 4.0, 6.0), (3.2, 5.5, 2.0), (6.5, -2.0, 3.0)]
    script = "\n".join(f"  - {{at: {t}, wheels: {{left: {a}, right: {b}}}}}" for t, a, b in segments)
    robot_file = tmp_path / "cart.yaml"
    robot_file.write_text(DIFF.replace("\n    ", "\n"))
    scen = scenario_from_yaml(tmp_path, f"robot: cart.yaml\nstep: 0.01\nduration: 10\nscript:\n{script}\n")
    res = run_scenario(scen, keep=True)
    s = np.zeros(3)
    bounds = [t for t, _, _ in segments] + [10.0]
    for (t0, wl, wr), t1 in zip(segments, bounds[1:]):
        v, w = diff_twist(wl, wr)
        sol = solve_ivp(unicycle, (t0, t1), s, args=(v, w), rtol=1e-12, atol=1e-13, method="DOP853")
        s = sol.y[:, -1]
    tr = res.trace
    got = np.array([tr["x"][-1], tr["y"][-1], tr["theta"][-1]])
    np.testing.assert_allclose(got, s, rtol=0, atol=1e-8)
    assert res.peak_slip < 1e-12


@pytest.mark.parametrize("R", [2.0, -2.5, 1.0])
def test_car_follows_twist_with_ackermann_angles(R, car_robot):
    # Ackermann (from memory; standard vehicle-dynamics texts): cot(outer) - cot(inner) =
    # track / wheelbase, each wheel's axle through the ICR on the rear axle line; no slip.
    L, t = 0.8, 0.6
    robot = car_robot(L, t)
    sim = Simulator(robot, 0.01)
    rows = [sim.step(twist=(0.6, 0.0, 0.6 / R)) for _ in range(300)]
    last = rows[-1]
    fl, fr = last.steer[2], last.steer[3]
    inner, outer = (fl, fr) if R > 0 else (fr, fl)
    assert abs(1 / math.tan(outer) - 1 / math.tan(inner)) == pytest.approx(t / L, abs=1e-9)
    assert fl == pytest.approx(math.atan(L / (R - t / 2)), abs=1e-9)
    assert fr == pytest.approx(math.atan(L / (R + t / 2)), abs=1e-9)
    assert max(r.slip for r in rows) < 1e-12
    # the base drives the circle of radius R: ICR at the world point the circle is about
    np.testing.assert_allclose(rows[0].icr, [0.0, R], atol=1e-9)


def test_bundled_car_zero_slip_once_aligned(repo_root):
    # The bundled greenhouse rover steers at 1.5 rad/s; with align: wait it holds the drive
    # until the wheels are within tolerance; once they reach the Ackermann angles
    # (from memory, as above) no wheel slips.
    from sim.files.scenario import load_scenario
    res = run_scenario(load_scenario(repo_root / "scenarios" / "greenhouse-rover-ackermann.yaml"), keep=True)
    tr = res.trace
    L, t, R = 0.8, 0.6, 2.0
    inner, outer = math.atan(L / (R - t / 2)), math.atan(L / (R + t / 2))
    aligned = (np.abs(tr["front_left.steer"] - inner) < 1e-12) & (np.abs(tr["front_right.steer"] - outer) < 1e-12)
    assert aligned.any() and aligned[np.argmax(aligned):].all()
    assert np.max(tr["slip"][aligned]) < 1e-12
    assert np.all(tr["front_left.slip_lat"][aligned] == 0.0) or np.max(np.abs(tr["front_left.slip_lat"][aligned])) < 1e-12


def test_mecanum_twist_commands_give_lynch_park_wheel_speeds(robot_from_yaml, scenario_from_yaml, tmp_path):
    # Lynch & Park 2017, eq. (13.10) (from memory), read from the spin columns of a run.
    l, w, r = 0.2, 0.17, 0.05
    (tmp_path / "tote.yaml").write_text(f"""
wheels:
  - {{name: w1, type: swedish, x: {l}, y: {w}, radius: {r}, roller: -45 deg}}
  - {{name: w2, type: swedish, x: {l}, y: {-w}, radius: {r}, roller: 45 deg}}
  - {{name: w3, type: swedish, x: {-l}, y: {-w}, radius: {r}, roller: -45 deg}}
  - {{name: w4, type: swedish, x: {-l}, y: {w}, radius: {r}, roller: 45 deg}}
""")
    twists = [(0.5, 0.0, 0.0), (0.0, -0.4, 0.0), (0.2, 0.3, 0.8), (-0.1, 0.0, -1.2)]
    script = "\n".join(f"  - {{at: {i}, twist: {{vx: {a}, vy: {b}, omega: {c}}}}}" for i, (a, b, c) in enumerate(twists))
    scen = scenario_from_yaml(tmp_path, f"robot: tote.yaml\nstep: 0.01\nduration: 4\nscript:\n{script}\n")
    tr = run_scenario(scen, keep=True).trace
    H = np.array([[-l - w, 1, -1], [l + w, 1, 1], [l + w, 1, -1], [-l - w, 1, 1]]) / r
    for i, (vx, vy, om) in enumerate(twists):
        k = int(np.flatnonzero(np.isclose(tr["t"], i + 0.5))[0])
        spins = [tr[f"w{j}.spin"][k] for j in range(1, 5)]
        np.testing.assert_allclose(spins, H @ [om, vx, vy], atol=1e-9)
        np.testing.assert_allclose([tr["vx"][k], tr["vy"][k], tr["omega"][k]], [vx, vy, om], atol=1e-12)
        assert tr["slip"][k] < 1e-12


@pytest.mark.parametrize("psi0_deg,v,trail", [(90.0, 0.3, 0.03), (170.0, 0.5, 0.05), (-60.0, 0.2, 0.02)])
def test_castor_dragged_straight_follows_tractrix(psi0_deg, v, trail, robot_from_yaml):
    # Tractrix (classical): a trailing castor dragged straight at speed v from angle psi0
    # obeys tan(psi/2) = tan(psi0/2) exp(-v t / trail).
    robot = robot_from_yaml(f"""
        wheels:
          - {{name: left, type: fixed, x: 0.0, y: 0.22, radius: 0.08}}
          - {{name: right, type: fixed, x: 0.0, y: -0.22, radius: 0.08}}
          - {{name: c, type: castor, x: 0.28, y: 0.0, radius: 0.04, trail: {trail}, heading: {psi0_deg} deg}}
    """)
    sim = Simulator(robot, 0.005)
    psi0 = math.radians(psi0_deg)
    worst = 0.0
    for k in range(800):
        row = sim.step(twist=(v, 0.0, 0.0))
        want = 2 * math.atan(math.tan(psi0 / 2) * math.exp(-v * row.t / trail))
        worst = max(worst, abs(row.steer[2] - want))
    assert worst < 1e-9
    # the castor rolls freely at v / r once it trails in line
    assert row.spin[2] == pytest.approx(v / 0.04, rel=1e-6)


def test_skid_steer_turn_slips_on_outer_axles_only(repo_root):
    # Skid steering (common practice): the middle axle of a six-wheel skid steer sits at the
    # turning centre's x, so it does not slip sideways; the front and rear axles do, in
    # opposite directions, by omega times their distance from the middle axle.
    from sim.files.scenario import load_scenario
    tr = run_scenario(load_scenario(repo_root / "scenarios" / "field-rover-skid-turn.yaml"), keep=True).trace
    turning = tr["omega"] > 0.1
    assert turning.sum() > 100
    for side in ("left", "right"):
        np.testing.assert_allclose(tr[f"{side}_middle.slip_lat"][turning], 0.0, atol=1e-12)
        np.testing.assert_allclose(tr[f"{side}_front.slip_lat"][turning], 0.35 * tr["omega"][turning], rtol=1e-9)
        np.testing.assert_allclose(tr[f"{side}_rear.slip_lat"][turning], -0.35 * tr["omega"][turning], rtol=1e-9)
    assert np.all(np.abs(tr["left_front.slip_lat"][turning]) > 0.01)


@pytest.mark.parametrize("command", ["wheels", "twist"])
def test_halving_dt_leaves_constant_command_run_unchanged(command, robot_from_yaml):
    # Exact SE(2) steps and exact castor swivel: with constant commands and no ramps the step
    # size does not matter (property, issue 3).
    robot = robot_from_yaml(DIFF.replace("castor, x: 0.3, y: 0.0,", "castor, x: 0.3, y: 0.1, heading: 120 deg,"))
    finals = []
    for dt in (0.02, 0.01, 0.005):
        sim = Simulator(robot, dt)
        n = int(round(6.0 / dt))
        for _ in range(n):
            if command == "wheels":
                sim.step(wheels={"left": 3.0, "right": 5.5})
            else:
                sim.step(twist=(0.3, 0.0, 0.4))
        # pose, castor heading, drive wheel rotation (the castor's own rolling angle is summed
        # step by step and is not part of this property)
        finals.append(np.concatenate([sim.pose, sim.heading[2:], sim.angle[:2]]))
    np.testing.assert_allclose(finals[1], finals[0], rtol=0, atol=1e-9)
    np.testing.assert_allclose(finals[2], finals[0], rtol=0, atol=1e-9)


def test_rank_deficient_single_steered_drive(robot_from_yaml, scenario_from_yaml, tmp_path):
    # One driven steered wheel on ball units: rotation about the wheel's contact is undetermined.
    (tmp_path / "trolley.yaml").write_text("""
wheels:
  - {name: drive, type: steered, x: 0.3, y: 0.0, radius: 0.1}
  - {name: b1, type: ball, x: -0.2, y: 0.2, radius: 0.03}
  - {name: b2, type: ball, x: -0.2, y: -0.2, radius: 0.03}
""")
    scen = scenario_from_yaml(tmp_path, """
        robot: trolley.yaml
        step: 0.01
        duration: 3
        script:
          - {at: 0, wheels: {drive: {spin: 4.0, steer: 30 deg}}}
          - {at: 1.5, twist: {vx: 0.2, vy: 0.1, omega: 0.5}}
    """)
    res = run_scenario(scen, keep=True)
    tr = res.trace
    for col in ("x", "y", "theta", "vx", "vy", "omega", "slip", "b1.spin", "drive.spin"):
        assert np.all(np.isfinite(tr[col])), col
    assert res.underdetermined_t == 0.0
    assert "undetermined" in summary_text(res)
    # the drive wheel's own rows are met exactly: it rolls at r * spin along 30 deg, no slip
    k = 50
    vc = np.array([tr["vx"][k], tr["vy"][k] + tr["omega"][k] * 0.3])
    np.testing.assert_allclose(vc, 0.4 * np.array([math.cos(math.pi / 6), math.sin(math.pi / 6)]), atol=1e-12)
    assert res.peak_slip < 1e-12
    again = run_scenario(scen, keep=True).trace
    assert all(np.array_equal(tr[c], again[c], equal_nan=True) for c in tr)


def test_diff_drive_sideways_twist_projected(robot_from_yaml, scenario_from_yaml, tmp_path):
    (tmp_path / "cart.yaml").write_text(DIFF.replace("\n    ", "\n"))
    scen = scenario_from_yaml(tmp_path, """
        robot: cart.yaml
        step: 0.01
        duration: 2
        script:
          - {at: 0, twist: {vx: 0.3, vy: 0.2, omega: 0.1}}
    """)
    res = run_scenario(scen, keep=True)
    tr = res.trace
    np.testing.assert_allclose(tr["vy"], 0.0, atol=1e-12)   # a diff drive cannot move sideways
    np.testing.assert_allclose(tr["vx"], 0.3, atol=1e-12)
    np.testing.assert_allclose(tr["omega"], 0.1, atol=1e-12)
    assert res.peak_shortfall == pytest.approx(0.2)
    assert res.peak_shortfall_twist == pytest.approx((0.0, 0.2, 0.0), abs=1e-12)
    assert "vy 0.2 m/s" in summary_text(res)
    assert res.peak_slip < 1e-12
    np.testing.assert_allclose(tr["cmd_vy"], 0.2)   # the request is recorded as given


def test_max_spin_scaling_keeps_curvature_in_a_run(robot_from_yaml):
    robot = robot_from_yaml("""
        wheels:
          - {name: left, type: fixed, x: 0.0, y: 0.2, radius: 0.1, max_spin: 5}
          - {name: right, type: fixed, x: 0.0, y: -0.2, radius: 0.1, max_spin: 5}
    """)
    sim = Simulator(robot, 0.01)
    for _ in range(10):
        row = sim.step(twist=(1.0, 0.0, 0.5))
    assert row.twist[0] / row.twist[2] == pytest.approx(2.0, rel=1e-12)
    assert max(abs(row.spin)) == pytest.approx(5.0)
    assert row.slip < 1e-12


QUAD = """
    wheels:
      - {name: fl, type: steered, x: 0.35, y: 0.25, radius: 0.075, max_steer_rate: 3.0}
      - {name: fr, type: steered, x: 0.35, y: -0.25, radius: 0.075, max_steer_rate: 3.0}
      - {name: rl, type: steered, x: -0.35, y: 0.25, radius: 0.075, max_steer_rate: 3.0}
      - {name: rr, type: steered, x: -0.35, y: -0.25, radius: 0.075, max_steer_rate: 3.0}
"""


def _quad_run(robot, align, tol=math.radians(2.0)):
    sim = Simulator(robot, 0.01, align=align, align_tolerance=tol)
    rows = [sim.step(twist=(0.5, 0.0, 0.0)) for _ in range(50)]
    rows += [sim.step(twist=(0.0, 0.0, 1.0)) for _ in range(100)]
    return rows


def test_align_policies_differ_as_documented(robot_from_yaml):
    # Switching four steered modules from straight ahead to turning on the spot: each module
    # must turn to 90 deg + atan2(x, -y) (tangent of its circle, rigid-body kinematics).
    robot = robot_from_yaml(QUAD)
    runs = {p: _quad_run(robot, p, tol=math.radians(0.01)) for p in ("wait", "cosine", "none")}
    peak = {p: max(r.slip for r in rows) for p, rows in runs.items()}
    assert peak["wait"] < 1e-12            # wait: no drive until aligned, so no slip
    assert peak["none"] > 0.1              # none: drives misaligned wheels, and slips
    assert 1e-3 < peak["cosine"] < peak["none"]
    # wait: while any module is off by more than the tolerance, every spin command is 0
    for r in runs["wait"][50:]:
        err = np.abs(r.steer_cmd - r.steer)
        if np.any(err > math.radians(0.01)):
            assert np.all(r.spin_cmd == 0.0)
    # cosine: each module's spin command is its aligned spin times cos(steering error);
    # aligned spin for omega = 1 is the distance to the centre over r (common practice)
    rad = math.hypot(0.35, 0.25)
    for r in runs["cosine"][50:60]:
        err = r.steer_cmd - r.steer
        np.testing.assert_allclose(np.abs(r.spin_cmd), rad / 0.075 * np.maximum(np.cos(err), 0.0), rtol=1e-9)
    # all three end aligned on the tangents
    want = [math.atan2(0.35, -0.25) - math.pi, math.atan2(0.35, 0.25), math.atan2(-0.35, -0.25) + math.pi,
            math.atan2(-0.35, 0.25)]
    for rows in runs.values():
        tang = (np.array(rows[-1].steer) - np.array(want) + math.pi / 2) % math.pi - math.pi / 2
        np.testing.assert_allclose(tang, 0.0, atol=1e-9)


def test_wait_drives_a_wheel_held_at_its_steer_limit(robot_from_yaml):
    # A tricycle asked for a turn tighter than its steering allows: the wheel stops at its
    # limit (no longer turning), so `wait` lets it drive, on the widest turn it can make:
    # ICR on the rear axle at wheelbase / tan(limit) (tricycle geometry, common practice).
    robot = robot_from_yaml("""
        wheels:
          - {name: s, type: steered, x: 0.3, y: 0.0, radius: 0.1, steer_limits: [-30 deg, 30 deg], max_steer_rate: 2}
          - {name: l, type: fixed, x: 0.0, y: 0.2, radius: 0.1, driven: false}
          - {name: r, type: fixed, x: 0.0, y: -0.2, radius: 0.1, driven: false}
    """)
    sim = Simulator(robot, 0.01, align="wait")
    for _ in range(100):
        row = sim.step(twist=(0.3, 0.0, 3.0))
    assert row.steer[0] == pytest.approx(math.radians(30))
    assert row.spin[0] > 0
    assert row.twist[0] / row.twist[2] == pytest.approx(0.3 / math.tan(math.radians(30)), rel=1e-9)
    assert row.slip < 1e-12


@pytest.mark.parametrize("align", ["wait", "cosine"])
def test_steer_limit_turn_in_a_run(align, scenario_from_yaml, tmp_path):
    # The same as above through run_scenario (both engines), turning left then right.
    scen = scenario_from_yaml(tmp_path, f"""
        robot:
          wheels:
            - {{name: s, type: steered, x: 0.3, y: 0.0, radius: 0.1, steer_limits: [-30 deg, 30 deg],
               max_steer_rate: 2, max_spin_accel: 20}}
            - {{name: l, type: fixed, x: 0.0, y: 0.2, radius: 0.1, driven: false}}
            - {{name: r, type: fixed, x: 0.0, y: -0.2, radius: 0.1, driven: false}}
        step: 0.01
        duration: 3
        align: {align}
        script:
          - {{at: 0, twist: {{vx: 0.3, omega: 3.0}}}}
          - {{at: 1.5, twist: {{vx: 0.3, omega: -3.0}}}}
    """)
    tr = run_scenario(scen, keep=True).trace
    R = 0.3 / math.tan(math.radians(30))      # tricycle geometry (common practice)
    for t, sign in ((1.4, 1.0), (2.9, -1.0)):
        k = int(np.argmin(np.abs(tr["t"] - t)))
        assert tr["s.steer"][k] == pytest.approx(sign * math.radians(30))
        assert tr["vx"][k] / tr["omega"][k] == pytest.approx(sign * R, rel=1e-9)
        assert tr["s.spin"][k] > 1.0
    assert np.max(tr["slip"]) < 1e-12


def test_step_result_row_semantics(robot_from_yaml):
    # Row k holds the state at t_k and the motion applied from t_k on (issue 3).
    robot = robot_from_yaml(DIFF)
    sim = Simulator(robot, 0.1)
    r0 = sim.step(wheels={"left": 2.0, "right": 2.0})
    r1 = sim.step()
    assert r0.t == 0.0 and r1.t == pytest.approx(0.1)
    np.testing.assert_allclose(r0.pose, [0, 0, 0])
    np.testing.assert_allclose(r1.pose, [0.1 * 2.0 * R_WHEEL, 0, 0], atol=1e-15)
    assert np.isnan(r0.icr).all()        # pure translation: no ICR
    assert np.isnan(r0.spin_cmd[2]) and np.isnan(r0.steer_cmd[2])   # castor: no commands
    assert np.isnan(r0.slip_long[2]) and np.isnan(r0.slip_lat[2])
    assert r1.angle[0] == pytest.approx(0.2)   # cumulative wheel rotation at t_1


_WHEEL = st.fixed_dictionaries({
    "type": st.sampled_from(["fixed", "steered", "castor", "swedish", "ball"]),
    "x": st.integers(-100, 100).map(lambda v: v / 100),
    "y": st.integers(-100, 100).map(lambda v: v / 100),
    "heading": st.integers(-180, 180),
    "roller": st.sampled_from([-45, 0, 30, 45]),
    "driven": st.booleans(),
})


@settings(max_examples=40, deadline=None)
@given(st.lists(_WHEEL, min_size=1, max_size=5),
       st.lists(st.tuples(*[st.floats(-2, 2, allow_nan=False)] * 3), min_size=1, max_size=3),
       st.sampled_from(["wait", "cosine", "none"]))
def test_twist_commands_never_slip_on_any_layout(robot_from_yaml, wheels, twists, align):
    # Property (issue 3): a twist command is resolved into consistent wheel commands -- projected
    # onto what the fixed wheels allow, steered wheels along their contact velocities -- so with
    # no actuator limits nothing slips and every number stays finite, whatever the layout.
    lines = ["wheels:"]
    for i, w in enumerate(wheels):
        extra = {"castor": ", trail: 0.03", "swedish": f", roller: {w['roller']} deg"}.get(w["type"], "")
        driven = "false" if w["type"] == "ball" else str(w["driven"]).lower()
        lines.append(f"  - {{name: w{i}, type: {w['type']}, x: {w['x']}, y: {w['y']}, "
                     f"heading: {w['heading']} deg, radius: 0.05, driven: {driven}{extra}}}")
    # skid=False: a twist the wheels cannot follow is projected (skid steering would slip on purpose)
    sim = Simulator(robot_from_yaml("\n".join(lines) + "\n"), 0.01, align=align, skid=False)
    for tw in twists:
        for _ in range(4):
            row = sim.step(twist=tw)
            for v in (row.pose, row.twist, row.spin, row.steer, row.shortfall):
                assert np.all(np.isfinite(v))
            assert row.slip < 1e-6
