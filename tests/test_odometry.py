"""Wheel odometry: encoder model and dead reckoning (sim/odometry.py)."""
from __future__ import annotations

import copy
import math
import os
import types
from dataclasses import replace

import numpy as np
import pytest

from sim.cli import main
from sim.engine.simulator import Simulator
from sim.errors import InputError
from sim.odometry.encoders import Odometer, OdometrySpec
from sim.files.robotfile import load_robot
from sim.runs.runner import run_scenario
from sim.files.scenario import load_scenario, scenario_from_data
from sim.files.yamlread import load_file

HERE = os.path.dirname(os.path.abspath(__file__))
SCEN = os.path.join(HERE, "..", "scenarios")
ROBOTS = os.path.join(SCEN, "robots")
FINE = 2 ** 40          # counts per revolution: quantization far below the tolerances used


def robot_data(name, encoder=None, **extra):
    """A bundled robot file as plain data, optionally with an encoder on every rolling wheel."""
    data = copy.deepcopy(dict(load_file(os.path.join(ROBOTS, f"{name}.yaml"))))
    data["wheels"] = [dict(w) for w in data["wheels"]]
    for w in data["wheels"]:
        if encoder is not None and w["type"] != "ball":
            w["encoder"] = encoder
        w.update(extra.get(w["name"], {}))
    data["wheels"] += extra.get("add", [])
    return data


def scenario(robot, script, duration, odometry, step=0.01, **kw):
    data = {"robot": robot, "step": step, "duration": duration, "script": script, "odometry": odometry, **kw}
    return scenario_from_data(data, "<test>", base_dir=SCEN)


def track(res):
    """(truth (m, 3), estimate (m, 3)) from a kept trace."""
    tr = res.trace
    return (np.stack([tr["x"], tr["y"], tr["theta"]], axis=1),
            np.stack([tr["odom_x"], tr["odom_y"], tr["odom_theta"]], axis=1))


# -- perfect encoders ------------------------------------------------------------
ARC_AND_TURNS = [{"at": 0, "twist": {"vx": 0.5, "omega": 0.3}},
                 {"at": 3, "twist": {"vx": 0.2, "omega": -0.8}},
                 {"at": 6, "twist": {"omega": 1.2}},
                 {"at": 8, "stop": True}]


def test_perfect_encoders_reproduce_ground_truth_differential():
    scen = scenario(robot_data("ward-cart", FINE), ARC_AND_TURNS, 9, {"wheels": ["left", "right"]})
    res = run_scenario(scen, keep=True)
    assert res.peak_slip < 1e-9          # a consistent run
    truth, est = track(res)
    assert np.max(np.abs(est - truth)) < 1e-9
    assert res.odometry["peak_position_error"] < 1e-9 and res.odometry["peak_heading_error"] < 1e-9


def test_perfect_encoders_reproduce_ground_truth_steered_modules():
    # four steered modules, each with an encoder and an exact angle reading
    script = [{"at": 0, "twist": {"vx": 0.3, "vy": 0.2, "omega": 0.2}},
              {"at": 3, "twist": {"vx": -0.1, "vy": 0.3}},
              {"at": 6, "stop": True}]
    scen = scenario(robot_data("quad-steer", FINE), script, 7, {})
    res = run_scenario(scen, keep=True)
    truth, est = track(res)
    assert res.distance > 1.0
    assert np.max(np.abs(est - truth)) < 1e-9


def test_perfect_unpowered_tracking_wheels_reproduce_ground_truth():
    # a mecanum base dead-reckoned from three undriven omni tracking wheels (two
    # along x, one across), the wheels that drive it unmeasured
    add = [{"name": "track_l", "type": "swedish", "x": 0.0, "y": 0.15, "heading": 0.0, "radius": 0.03,
            "roller": 0.0, "driven": False, "encoder": FINE},
           {"name": "track_r", "type": "swedish", "x": 0.0, "y": -0.15, "heading": 0.0, "radius": 0.03,
            "roller": 0.0, "driven": False, "encoder": FINE},
           {"name": "track_s", "type": "swedish", "x": -0.1, "y": 0.0, "heading": "90 deg", "radius": 0.03,
            "roller": 0.0, "driven": False, "encoder": FINE}]
    script = [{"at": 0, "twist": {"vx": 0.3, "vy": -0.2, "omega": 0.4}}, {"at": 4, "stop": True}]
    scen = scenario(robot_data("tote-mecanum", add=add), script, 5, {"wheels": ["track_l", "track_r", "track_s"]})
    res = run_scenario(scen, keep=True)
    truth, est = track(res)
    assert res.distance > 1.0
    assert np.max(np.abs(est - truth)) < 1e-9


# -- quantization ----------------------------------------------------------------
def test_quantization_error_of_a_straight_run_is_bounded_by_one_count():
    # Closed form (common practice): an incremental encoder reports whole counts, so on a
    # straight run the distance is known to within one count, 2 pi r / N; with counts
    # floor(phi N / 2 pi) the error is exactly r (phi - (2 pi / N) floor(phi N / 2 pi)).
    N, r = 2048, 0.08
    script = [{"at": 0, "wheels": {"left": 5.0, "right": 5.0}}, {"at": 3.333, "stop": True}]
    scen = scenario(robot_data("ward-cart"), script, 4, {"wheels": ["left", "right"]})
    res = run_scenario(scen, keep=True)
    truth, est = track(res)
    assert np.max(np.abs(truth[:, 1:])) < 1e-12                          # straight (to rounding)
    bound = 2 * math.pi * r / N
    err = np.hypot(est[:, 0] - truth[:, 0], est[:, 1] - truth[:, 1])
    assert np.all(err < bound)
    assert res.odometry["peak_position_error"] < bound
    phi = float(np.cumsum(res.trace["left.spin"][:-1] * 0.01)[-1])     # true wheel rotation, rad
    assert phi == float(np.cumsum(res.trace["right.spin"][:-1] * 0.01)[-1])
    assert truth[-1, 0] == pytest.approx(r * phi, abs=1e-12)
    expected = r * (phi - (2 * math.pi / N) * math.floor(phi * N / (2 * math.pi)))
    assert err[-1] == pytest.approx(expected, abs=1e-12)
    assert expected > 0.05 * bound                                      # the case is not trivial


def test_steer_angle_quantization_sets_the_estimated_direction():
    # Crab at 31.3 deg with angle sensors of 1 deg resolution: the estimator sees every
    # module at 31 deg, so it dead-reckons a straight line at 31 deg (rounding, common
    # practice), while the base truly travels at 31.3 deg.
    extra = {n: {"steer_resolution": "1 deg"} for n in ("front_left", "front_right", "rear_left", "rear_right")}
    d = math.radians(31.3)
    script = [{"at": 0, "twist": {"vx": 0.3 * math.cos(d), "vy": 0.3 * math.sin(d)}}, {"at": 4, "stop": True}]
    start = {"steer": {n: "31.3 deg" for n in extra}}
    scen = scenario(robot_data("quad-steer", FINE, **extra), script, 5, {}, start=start)
    res = run_scenario(scen, keep=True)
    truth, est = track(res)
    assert math.degrees(math.atan2(truth[-1, 1], truth[-1, 0])) == pytest.approx(31.3, abs=1e-9)
    assert math.degrees(math.atan2(est[-1, 1], est[-1, 0])) == pytest.approx(31.0, abs=1e-9)
    assert math.hypot(*est[-1, :2]) == pytest.approx(math.hypot(*truth[-1, :2]), rel=1e-9)


# -- systematic errors -------------------------------------------------------------
def test_wrong_nominal_wheelbase_scales_the_estimated_turn():
    # Differential-drive forward kinematics (common practice): omega = (r_R w_R - r_L w_L) / b.
    # Turning on the spot, an estimator that believes wheelbase b_n and radius r_n reports a
    # heading change of (r_n / r) (b / b_n) times the true one.
    b, bn, rn = 0.44, 0.45, 0.081
    script = [{"at": 0, "twist": {"omega": 1.0}}, {"at": 5, "stop": True}]
    nominal = {"left": {"y": bn / 2, "radius": rn}, "right": {"y": -bn / 2, "radius": rn}}
    scen = scenario(robot_data("ward-cart", FINE), script, 6, {"wheels": ["left", "right"], "nominal": nominal})
    res = run_scenario(scen, keep=True)
    truth, est = track(res)
    assert truth[-1, 2] > 4.0
    assert est[-1, 2] == pytest.approx(truth[-1, 2] * (rn / 0.08) * (b / bn), rel=1e-9)
    assert res.odometry["final_heading_error"] == pytest.approx(
        abs(truth[-1, 2] * ((rn / 0.08) * (b / bn) - 1.0)), rel=1e-6)


# -- random errors -------------------------------------------------------------------
def _skid(left, right, seed, **kw):
    script = [{"at": 0, "wheels": {**{f"left_{p}": left for p in ("front", "middle", "rear")},
                                   **{f"right_{p}": right for p in ("front", "middle", "rear")}}}]
    odo = {"count_noise": 0.5, "slip_noise": 1.0, "seed": seed}
    return scenario(robot_data("field-rover", 4096), script, 6, odo, **kw)


def test_seeded_noise_runs_are_byte_identical(tmp_path):
    paths = [tmp_path / f"{i}.csv" for i in range(3)]
    run_scenario(_skid(3.0, 6.0, seed=11), csv=str(paths[0]))
    run_scenario(_skid(3.0, 6.0, seed=11), csv=str(paths[1]))
    run_scenario(_skid(3.0, 6.0, seed=12), csv=str(paths[2]))
    a, b, c = (p.read_bytes() for p in paths)
    assert a == b
    assert a != c
    header = a.split(b"\r\n", 1)[0].decode().split(",")
    assert header[-9:] == ["odom_x", "odom_y", "odom_theta"] + [
        f"{s}_{p}.counts" for s in ("left", "right") for p in ("front", "middle", "rear")]


def test_skid_steer_odometry_drifts_more_turning_than_straight():
    # Common practice: a skid-steered base must slide its wheels sideways to turn, so its
    # wheel odometry is good driving straight and poor in turns.  Same wheel-speed sum,
    # same distance, same noise settings and seeds.
    for seed in range(3):
        straight = run_scenario(_skid(4.5, 4.5, seed))
        turning = run_scenario(_skid(3.0, 6.0, seed))
        assert straight.peak_slip < 1e-9 < 0.1 < turning.peak_slip
        assert turning.distance == pytest.approx(straight.distance, rel=1e-6)
        s, t = straight.odometry, turning.odometry
        assert t["final_position_error"] > 10 * s["final_position_error"]
        assert t["final_heading_error"] > 10 * s["final_heading_error"]


def test_count_noise_grows_like_a_random_walk():
    # count_noise is counts per sqrt(revolution): over q revolutions the count error has
    # standard deviation count_noise * sqrt(q).  Straight run, both wheels: distance error
    # std = r * (2 pi / N) * sigma * sqrt(q) / sqrt(2) (mean of two independent wheels).
    N, r, sigma = 4096, 0.08, 20.0
    robot = load_robot(os.path.join(ROBOTS, "ward-cart.yaml"))
    robot = replace(robot, wheels=tuple(replace(w, encoder=N) if w.type == "fixed" else w for w in robot.wheels))
    spec = OdometrySpec(("left", "right"), count_noise=sigma, seed=5)
    rng = np.random.default_rng(5)
    q = 20.0                                    # revolutions per run
    steps, dt = 50, 0.1
    angle = np.linspace(0.0, 2 * math.pi * q, steps + 1)
    errs = []
    for _ in range(400):
        odo = Odometer(spec, robot, dt, rng=rng)
        block = types.SimpleNamespace(
            angle=np.column_stack([angle, angle, np.zeros_like(angle), np.zeros_like(angle)]),
            steer=np.zeros((steps + 1, 4)), slip_long=np.zeros((steps + 1, 4)), slip_lat=np.zeros((steps + 1, 4)),
            pose=np.column_stack([r * angle, np.zeros_like(angle), np.zeros_like(angle)]))
        out = odo.update_block(block)
        errs.append(out[-1, 0] - r * angle[-1])
    expected = r * (2 * math.pi / N) * sigma * math.sqrt(q) / math.sqrt(2)
    assert np.std(errs) == pytest.approx(expected, rel=0.15)      # 400 samples: ~4 % sampling error


def test_block_update_matches_row_by_row():
    robot = load_robot(os.path.join(ROBOTS, "quad-steer.yaml"))
    robot = replace(robot, wheels=tuple(replace(w, encoder=1024, steer_resolution=math.radians(0.5))
                                        for w in robot.wheels))
    spec = OdometrySpec(tuple(w.name for w in robot.wheels), count_noise=2.0, slip_noise=0.5, seed=3)
    sim = Simulator(robot, 0.02)
    rows = [sim.step(twist=(0.3, 0.1, 0.5 if k < 100 else -0.3)) for k in range(200)]
    one = Odometer(spec, robot, 0.02)
    a = np.array([one.update(r) for r in rows])
    blk = Odometer(spec, robot, 0.02)
    st = lambda f, sl: np.array([getattr(r, f) for r in rows[sl]])
    parts = []
    for sl in (slice(0, 1), slice(1, 77), slice(77, 200)):
        parts.append(blk.update_block(types.SimpleNamespace(
            angle=st("angle", sl), steer=st("steer", sl), slip_long=st("slip_long", sl),
            slip_lat=st("slip_lat", sl), pose=st("pose", sl))))
    b = np.vstack(parts)
    assert np.max(np.abs(a - b)) < 1e-12
    assert one.summary() == pytest.approx(blk.summary(), abs=1e-12)


def test_demo_scenario_passes():
    res = run_scenario(load_scenario(os.path.join(SCEN, "ward-cart-odometry.yaml")))
    assert res.passed
    # its description's first-order estimate: heading low by 4 x (0.41 + 0.32) deg, plus noise
    assert math.degrees(res.odometry["final_heading_error"]) == pytest.approx(2.9, abs=0.4)


# -- bad input ---------------------------------------------------------------------
BAD = [
    ("wheels: [left, rihgt]", "did you mean 'right'"),
    ("wheels: [left, castor_front]", "castor_front' has no encoder"),
    ("wheels: [left, left]", "listed twice"),
    ("wheels: []", "at least one measured wheel"),
    ("wheels: [left]", "determine only 2 of the 3 body motions"),
    ("nominal: {left: {radius: -0.08}}", "must be > 0"),
    ("nominal: {left: {radius: 0.08, toe: 1}}", "unknown key 'toe'"),
    ("nominal: {castor_front: {heading: 10 deg}}", "read by its angle sensor"),
    ("nominal: {lefty: {radius: 0.08}}", "no wheel named 'lefty'"),
    ("count_noise: -1", "must be >= 0"),
    ("seed: true", "expected a whole number >= 0"),
    ("seed: 1.5", "expected a whole number >= 0"),
    ("slipnoise: 1", "did you mean 'slip_noise'"),
]


@pytest.mark.parametrize("section,message", BAD)
def test_bad_odometry_section(tmp_path, capsys, section, message):
    text = (f"robot: {os.path.join(ROBOTS, 'ward-cart.yaml')}\nstep: 0.01\nduration: 1\n"
            "script:\n  - {at: 0, twist: {vx: 0.1}}\nodometry:\n" + "".join(f"  {section}\n"))
    path = tmp_path / "s.yaml"
    path.write_text(text)
    with pytest.raises(InputError) as exc:
        load_scenario(path)
    assert message in str(exc.value)
    assert exc.value.line == 7                      # the offending line
    out = tmp_path / "t.csv"
    assert main(["run", str(path), "--csv", str(out)]) == 2
    err = capsys.readouterr().err
    assert f"{path}:7:" in err and message in err and "Traceback" not in err
    assert not out.exists() and not (tmp_path / "t.csv.part").exists()


def test_no_encoders_anywhere_is_reported():
    data = robot_data("field-rover")
    with pytest.raises(InputError, match="no wheel has an encoder"):
        scenario(data, [{"at": 0, "stop": True}], 1, {})
