"""The Python controller interface: observations, commands, control period, --controller."""
from __future__ import annotations

import math
import pathlib

import numpy as np
import pytest

from sim.engine.simulator import step_times
from sim.errors import InputError
from sim.files.scenario import load_scenario
from sim.runs.runner import entry_steps, run_scenario

HERE = pathlib.Path(__file__).resolve().parent
CART = HERE.parent / "scenarios" / "robots" / "ward-cart.yaml"
GOAL = (1.0, 0.6)        # m, where GoToGoal drives the cart


class GoToGoal:
    """Proportional heading controller: turn toward the goal at a rate proportional to the
    heading error, drive forward at a speed proportional to the distance (and only while
    roughly facing the goal), stop within 3 mm.  Needs ``observe_truth: true``."""

    def __init__(self, goal=GOAL, k_heading=4.0, k_speed=3.0, v_max=0.8):
        self.goal, self.kh, self.kv, self.v_max = goal, k_heading, k_speed, v_max
        self.seen = []

    def command(self, obs):
        self.seen.append(obs)
        x, y, theta = obs.pose
        dx, dy = self.goal[0] - x, self.goal[1] - y
        dist = math.hypot(dx, dy)
        if dist < 0.003:
            return (0.0, 0.0, 0.0)
        err = (math.atan2(dy, dx) - theta + math.pi) % (2 * math.pi) - math.pi
        return (min(self.v_max, self.kv * dist) * max(0.0, math.cos(err)) ** 3, 0.0, self.kh * err)


class Recorder:
    """Records observations; drives the cart forward slowly."""

    def __init__(self):
        self.seen = []

    def command(self, obs):
        self.seen.append(obs)
        return (0.2, 0.0, 0.3)


def _scenario(tmp_path, body, name="s.yaml"):
    p = tmp_path / name
    p.write_text(f"robot: {CART}\nstep: 0.01\n" + body)
    return load_scenario(p)


def _goal_scenario(tmp_path, truth=True):
    return _scenario(tmp_path, f"""duration: 4
control_period: 0.05
observe_truth: {'true' if truth else 'false'}
checks:
  - at: end
    pose: {{x: {GOAL[0]}, y: {GOAL[1]}}}
    tolerance: {{position: 0.01}}
""", "goal.yaml")


def test_proportional_heading_controller_reaches_the_goal(tmp_path):
    scen = _goal_scenario(tmp_path)
    ctl = GoToGoal()
    res = run_scenario(scen, controller=ctl, keep=True)
    x, y, _ = res.final_pose
    # the reference is the goal itself: the cart must end on it
    assert math.hypot(x - GOAL[0], y - GOAL[1]) < 0.01
    assert res.passed
    # it was asked every control period (0.05 s = 5 steps), rows 0, 5, ..., 800
    assert [o.t for o in ctl.seen] == [step_times(k, 0.01) for k in range(0, 401, 5)]
    # and saw the true pose of the trace row at that time
    tr = res.trace
    for o in ctl.seen[::20]:
        k = int(round(o.t / 0.01))
        assert o.pose == (tr["x"][k], tr["y"][k], tr["theta"][k])
    # the path is no shorter than the straight line to the goal
    assert res.distance >= math.hypot(*GOAL) - 0.01


def test_the_same_controller_through_the_command_line(tmp_path, run_module):
    scen = _goal_scenario(tmp_path)
    api = tmp_path / "api.csv"
    run_scenario(scen, csv=str(api), controller=GoToGoal())
    p = run_module(["run", scen.source, "--controller", "test_control:GoToGoal", "--csv", tmp_path / "cli.csv"],
                   cwd=HERE, timeout=120)
    assert p.returncode == 0, p.stdout + p.stderr
    assert "PASS      pose at t=4 s" in p.stdout
    assert (tmp_path / "cli.csv").read_bytes() == api.read_bytes()


def test_no_true_pose_unless_the_scenario_allows_it(tmp_path):
    scen = _scenario(tmp_path, "duration: 0.1\n")
    rec = Recorder()
    run_scenario(scen, controller=rec)
    assert len(rec.seen) == 11 and all(o.pose is None for o in rec.seen)
    assert set(rec.seen[0].counts) == {"left", "right"}          # the wheels with an encoder
    assert set(rec.seen[0].steer) == {"castor_front", "castor_rear"}


def test_exact_counts_are_whole_rotations_times_encoder_resolution(tmp_path):
    # without an odometry section a wheel with `encoder: 2048` reads floor(rotation x 2048 / 2 pi)
    # (an incremental encoder's count, common practice); the rotation is the integral of the spin
    scen = _scenario(tmp_path, "duration: 1\n")
    rec = Recorder()
    res = run_scenario(scen, controller=rec, keep=True)
    tr = res.trace
    for name in ("left", "right"):
        want = np.floor(tr[f"{name}.angle"] * 2048 / (2 * math.pi))    # row k: the rotation at t_k
        got = [o.counts[name] for o in rec.seen]
        assert got == [int(c) for c in want]
        assert got[-1] > 300        # it really turned: about 2.6 m/s / 0.08 m over 1 s
    # castor readings are exact (no steer_resolution): the heading at t_k
    assert rec.seen[50].steer["castor_front"] == tr["castor_front.steer"][50]


class Replay:
    """Gives a scenario's script entries at their steps (stop as zero wheel speeds)."""

    def __init__(self, scen):
        self.at = {k: c for k, c in zip(entry_steps(scen.script, scen.step), scen.script)}
        self.dt = scen.step
        self.seen = []

    def command(self, obs):
        self.seen.append(obs)
        c = self.at.get(int(round(obs.t / self.dt)))
        if c is None:
            return None
        if c.kind == "stop":
            return {"left": 0.0, "right": 0.0}
        return c.value if c.kind == "twist" else dict(c.value)


def test_counts_go_through_the_odometry_model_and_replay_is_byte_identical(tmp_path):
    # the bundled odometry scenario's encoders have random count errors; a controller that gives the
    # script's commands at the same steps reproduces the scripted trace (counts and engine columns
    # exactly), so reading the encoders ahead of each row leaves the random stream untouched, and
    # the counts it read are the trace's NAME.counts (the encoder model's output)
    odo = (HERE.parent / "scenarios" / "ward-cart-odometry.yaml").read_text().split("odometry:")[1].split("checks:")[0]
    scen = _scenario(tmp_path, "duration: 2\nscript:\n  - {at: 0, twist: {vx: 0.5, omega: 0.4}}\n"
                               "  - {at: 0.8, twist: {omega: -2}}\n  - {at: 1.5, stop: true}\n"
                               "odometry:" + odo)
    assert scen.odometry.count_noise == 1.0
    ref = run_scenario(scen, keep=True).trace
    rep = Replay(scen)
    res = run_scenario(scen, controller=rep, keep=True)
    assert list(res.trace) == list(ref)
    for col, want in ref.items():
        got = res.trace[col]
        if col.startswith("odom_"):
            # the dead reckoning takes the rows one at a time here, a block at a time there:
            # the same numbers to rounding
            assert np.allclose(got, want, rtol=0, atol=1e-12), col
        else:
            assert np.array_equal(got, want, equal_nan=True), col
    exact = np.floor(res.trace["left.angle"] * 2048 / (2 * math.pi))
    counts = np.array([o.counts["left"] for o in rep.seen])
    assert np.array_equal(counts, res.trace["left.counts"][:len(counts)])
    assert np.any(counts != exact[:len(counts)])     # the noise shows
    assert np.max(np.abs(counts - exact[:len(counts)])) < 40


def test_steering_readings_round_to_the_resolution(tmp_path, robot_from_yaml):
    p = tmp_path / "s.yaml"
    p.write_text("""
robot:
  wheels:
    - {name: rear, type: fixed, x: 0, y: 0, radius: 0.1}
    - {name: front, type: steered, x: 0.5, y: 0, radius: 0.1, max_steer_rate: 1.0,
       steer_resolution: 1 deg, steer_limits: [-60 deg, 60 deg]}
step: 0.01
duration: 0.5
""")
    scen = load_scenario(p)

    class Steer:
        seen = []

        def command(self, obs):
            self.seen.append(obs)
            return {"front": {"spin": 2.0, "steer": 0.4}}

    ctl = Steer()
    res = run_scenario(scen, controller=ctl, keep=True)
    deg = math.radians(1.0)
    for k in (10, 25, 50):
        o = ctl.seen[k]
        true = res.trace["front.steer"][k]           # the angle at t_k
        assert o.steer["front"] == pytest.approx(round(true / deg) * deg, abs=1e-15)
        assert abs(o.steer["front"] - true) <= deg / 2
    assert ctl.seen[50].steer["front"] == pytest.approx(0.4, abs=deg / 2)   # 1 rad/s for 0.5 s, stops at 0.4


@pytest.mark.parametrize("answer,fragment", [
    ((1.0, 2.0), "expected [vx, vy, omega]"),
    ((math.nan, 0.0, 0.0), "finite"),
    ((1e9, 0.0, 0.0), "beyond the allowed"),
    ({"lefty": 1.0}, "no wheel named 'lefty'"),
    ({"castor_front": 1.0}, "not driven"),
    ({"left": {"steer": 0.1}}, "not steered"),
    ("fast", "expected [vx, vy, omega]"),
])
def test_a_bad_command_is_an_input_error_without_a_file(tmp_path, answer, fragment):
    scen = _scenario(tmp_path, "duration: 0.2\n")

    class Bad:
        def command(self, obs):
            return answer if obs.t > 0.05 else (0.1, 0.0, 0.0)

    with pytest.raises(InputError) as exc:
        run_scenario(scen, csv=str(tmp_path / "out.csv"), controller=Bad())
    assert fragment in str(exc.value) and "t=0.06 s" in str(exc.value)
    assert not any(p.name.startswith("out.csv") for p in tmp_path.iterdir())


@pytest.mark.parametrize("spec,fragment", [
    ("test_control", "expected package.module:Name"),
    ("no_such_module_here:X", "no module named 'no_such_module_here'"),
    ("test_control:Nothing", "has no 'Nothing'"),
    ("test_control:GOAL", "no command(observation) method"),
    ("test_control:_NeedsArgs", "without arguments"),
])
def test_controller_loading_errors(tmp_path, monkeypatch, cli, expect_input_error, spec, fragment):
    monkeypatch.chdir(HERE)
    scen = _goal_scenario(tmp_path)
    code, out, err = cli(["run", scen.source, "--controller", spec, "--csv", tmp_path / "o.csv"])
    expect_input_error(code, err, "--controller", None, fragment)
    assert not (tmp_path / "o.csv").exists()


class _NeedsArgs:
    def __init__(self, gain):
        self.gain = gain

    def command(self, obs):
        return None


def test_script_is_not_needed_with_a_controller_but_is_without(tmp_path, cli):
    scen = _scenario(tmp_path, "duration: 0.1\n")
    with pytest.raises(InputError, match="no script or commands"):
        run_scenario(scen)
    code, out, _ = cli(["run", scen.source, "--controller", "test_control:Recorder"])
    assert code == 0 and "11 rows" in out
