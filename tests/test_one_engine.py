"""One engine: stepping one at a time and running a stretch are the same code, compiled or not,
and the engine's record of its decisions is what the panel and the summary say."""
from __future__ import annotations

import json
import math
import os
import pathlib
import subprocess
import sys

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from sim.engine.notes import row_notes
from sim.engine.simulator import ALIGN_POLICIES, Simulator
from sim.files.robotfile import robot_from_data

ROOT = pathlib.Path(__file__).resolve().parents[1]

_wheel = st.fixed_dictionaries({
    "type": st.sampled_from(["fixed", "steered", "castor", "swedish", "ball"]),
    "x": st.floats(-0.6, 0.6), "y": st.floats(-0.6, 0.6), "heading": st.floats(-180, 180),
    "driven": st.booleans(), "roller": st.sampled_from([-45.0, 45.0, 90.0 - 1e-3, 30.0]),
    "rate": st.sampled_from([None, 2.0, 6.0]), "accel": st.sampled_from([None, 20.0, 80.0]),
    "limits": st.sampled_from([None, (-30.0, 30.0), (-100.0, 100.0)]),
})


def _robot(wheels):
    items = []
    for i, w in enumerate(wheels):
        item = {"name": f"w{i}", "type": w["type"], "x": w["x"], "y": w["y"], "heading": f"{w['heading']} deg",
                "radius": 0.06, "driven": w["driven"] and w["type"] != "ball"}
        if w["type"] == "castor":
            item["trail"] = 0.04
        if w["type"] == "swedish":
            item["roller"] = f"{min(w['roller'], 89.0)} deg"
        if w["type"] == "steered":
            if w["rate"]:
                item["max_steer_rate"] = w["rate"]
            if w["limits"]:
                lo, hi = w["limits"]
                item["steer_limits"] = [f"{lo} deg", f"{hi} deg"]
                item["heading"] = "0 deg"
        if item["driven"] and w["accel"]:
            item["max_spin_accel"] = w["accel"]
            item["max_spin"] = 30.0
        items.append(item)
    return robot_from_data({"name": "random", "wheels": items})


_command = st.one_of(
    st.tuples(st.just("twist"), st.tuples(st.floats(-1, 1), st.floats(-1, 1), st.floats(-2, 2))),
    st.tuples(st.just("spins"), st.lists(st.floats(-10, 10), min_size=6, max_size=6),
              st.lists(st.floats(-2, 2), min_size=6, max_size=6)),
    st.tuples(st.just("stop")),
)


def _apply(sim, cmd):
    if cmd[0] == "twist":
        sim.command_twist(cmd[1])
    elif cmd[0] == "stop":
        sim.stop()
    else:
        wheels = {}
        for i, w in enumerate(sim.robot.wheels):
            c = {}
            if w.driven:
                c["spin"] = cmd[1][i]
            if w.type == "steered":
                c["steer"] = cmd[2][i]
            if c:
                wheels[w.name] = c
        sim.command_wheels(wheels)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(wheels=st.lists(_wheel, min_size=2, max_size=5),
       script=st.lists(st.tuples(st.integers(1, 25), _command), min_size=1, max_size=6),
       align=st.sampled_from(ALIGN_POLICIES))
def test_one_step_at_a_time_equals_a_stretch_byte_for_byte(wheels, script, align):
    try:
        robot = _robot(wheels)
    except Exception:  # a layout the robot file refuses (e.g. two wheels at one point) is not a case
        return
    one = Simulator(robot, 0.01, start=(0.3, -0.2, 0.4), align=align)
    many = Simulator(robot, 0.01, start=(0.3, -0.2, 0.4), align=align)
    rows_one, rows_many = [], []
    for steps, cmd in script:
        _apply(one, cmd)
        _apply(many, cmd)
        rows_one += [one.step().values for _ in range(steps)]
        rows_many.append(many.advance(steps).values)
    a, b = np.array(rows_one), np.vstack(rows_many)
    assert a.shape == b.shape
    assert a.tobytes() == b.tobytes()
    _tally_matches_numpy(robot, b, [steps for steps, _ in script])


def _tally_matches_numpy(robot, rows, cuts):
    """The compiled run tally, folded whole or in the script's blocks, against numpy over all rows."""
    from sim.engine.notes import Tally
    from sim.engine.record import Block
    whole, parts = Tally(robot, 0.01), Tally(robot, 0.01)
    whole.fold(Block(0, rows, len(robot.wheels)))
    k = 0
    for m in cuts:
        parts.fold(Block(k, rows[k:k + m], len(robot.wheels)))
        k += m
    assert whole.acc.tobytes() == parts.acc.tobytes()
    blk = Block(0, rows, len(robot.wheels))
    steps = np.diff(blk.pose[:, :2], axis=0)
    assert whole.distance == pytest.approx(np.hypot(steps[:, 0], steps[:, 1]).sum(), rel=1e-12, abs=1e-15)
    assert whole.peak_slip[0] == max(0.0, blk.slip.max())
    kinds = whole.kinds
    held = blk.held == 1.0
    assert kinds.get("held", {}).get("rows", 0) == held.sum()
    if held.any():
        assert kinds["held"]["extreme"] == np.nan_to_num(np.abs(blk.to_go[held])).max()
    scaled = blk.scale < 1.0
    if scaled.any():
        assert kinds["scaled"]["extreme"] == blk.scale[scaled].min()
    lim = blk.at_limit == 1.0
    if lim.any():
        first = [np.argmax(lim[:, i]) if lim[:, i].any() else None for i in range(len(robot.wheels))]
        order = sorted((f, i) for i, f in enumerate(first) if f is not None)
        assert kinds["at_limit"]["wheels"] == [robot.wheels[i].name for _, i in order]


CASES = [
    ("quad-steer", "cosine", [("twist", (0.5, 0.2, 0.3), 60), ("twist", (0.0, 0.4, -0.5), 80), ("stop", None, 30)]),
    ("ward-cart", "wait", [("wheels", {"left": 4.0, "right": 6.0}, 90), ("twist", (0.3, 0.0, 0.8), 90)]),
    ("field-rover", "none", [("twist", (0.4, 0.0, 0.6), 120)]),
    ("tote-mecanum", "wait", [("twist", (0.2, -0.3, 0.4), 100)]),
    ("greenhouse-rover", "wait", [("twist", (0.6, 0.0, 0.9), 150)]),
]

_RUNNER = """
import json, sys
import numpy as np
from sim.files.robotfile import load_robot
from sim.engine.simulator import Simulator
out = []
for name, align, script in json.loads(sys.argv[1]):
    sim = Simulator(load_robot(f"scenarios/robots/{name}.yaml"), 0.01, align=align)
    rows = []
    for kind, value, steps in script:
        if kind == "twist":
            sim.command_twist(value)
        elif kind == "wheels":
            sim.command_wheels(value)
        else:
            sim.stop()
        rows.append(sim.advance(steps).values)
    out.append(np.vstack(rows))
np.savez(sys.argv[2], *out)
"""


def test_uncompiled_path_agrees_with_compiled(tmp_path):
    # The same functions run as plain Python under NUMBA_DISABLE_JIT=1 (for a debugger).
    got = {}
    for flag in ("0", "1"):
        path = tmp_path / f"rows{flag}.npz"
        env = dict(os.environ, NUMBA_DISABLE_JIT=flag, PYTHONPATH=str(ROOT))
        p = subprocess.run([sys.executable, "-c", _RUNNER, json.dumps(CASES), str(path)], cwd=ROOT,
                           env=env, capture_output=True, text=True, timeout=600)
        assert p.returncode == 0, p.stderr
        with np.load(path) as z:
            got[flag] = [z[f"arr_{i}"] for i in range(len(CASES))]
    for a, b in zip(got["0"], got["1"]):
        assert a.shape == b.shape
        np.testing.assert_array_equal(np.isnan(a), np.isnan(b))
        np.testing.assert_allclose(np.nan_to_num(a), np.nan_to_num(b), rtol=0, atol=1e-12)


TRICYCLE = {
    "name": "tricycle", "wheels": [
        {"name": "front", "type": "steered", "x": 0.6, "y": 0.0, "radius": 0.1, "driven": True,
         "steer_limits": ["-30 deg", "30 deg"], "max_steer_rate": 2.0},
        {"name": "left", "type": "fixed", "x": 0.0, "y": 0.25, "radius": 0.1, "driven": False},
        {"name": "right", "type": "fixed", "x": 0.0, "y": -0.25, "radius": 0.1, "driven": False},
    ]}


def test_tricycle_at_its_steering_limit_drives_and_says_so(tmp_path, cli):
    # Asked to turn tighter than its 30 deg limit allows, the front wheel goes to the limit and
    # drives there; it is not waiting for steering, and the panel and summary say so.
    robot = robot_from_data(TRICYCLE)
    sim = Simulator(robot, 0.01, align="wait")
    for _ in range(100):
        row = sim.step(twist=(0.3, 0.0, 1.5))   # turning radius 0.2 m: needs atan(0.6 / 0.2) = 71.6 deg
    assert row.steer[0] == pytest.approx(math.radians(30))
    assert row.at_limit[0] == 1.0 and row.held == 0
    assert abs(row.spin[0]) > 1.0 and row.slip < 1e-12
    # at the limit the base drives the arc the limit allows: radius wheelbase / tan(30 deg)
    # (tricycle geometry, common practice)
    assert row.twist[0] / row.twist[2] == pytest.approx(0.6 / math.tan(math.radians(30)), rel=1e-9)
    notes = row_notes(robot, row, "wait")
    assert any("at a steering limit: front" in n for n in notes)
    assert not any("waiting" in n for n in notes)
    from sim.view.render import command_notes
    assert command_notes(robot, row, "wait") == notes + []
    # the summary of a scenario doing the same
    (tmp_path / "tri.yaml").write_text(json.dumps(TRICYCLE))
    (tmp_path / "s.yaml").write_text("robot: tri.yaml\nstep: 0.01\nduration: 1\nscript:\n"
                                     "  - {at: 0, twist: {vx: 0.3, omega: 1.5}}\n")
    code, out, err = cli(["run", str(tmp_path / "s.yaml")])
    assert code == 0, err
    assert "steering goal beyond a limit for front" in out
    assert "drives held for steering" in out   # the first 0.26 s: turning from 0 to 30 deg at 2 rad/s
    held = [ln for ln in out.splitlines() if "drives held" in ln][0]
    # held while more than 2 deg to go: (30 - 2) deg / 2 rad/s = 0.244 s, i.e. rows 0..24
    assert "0.25 s in all" in held


def test_skid_steer_turns_in_place_at_the_requested_rate(robot_from_yaml):
    # Issue: the six-wheel field rover turns in place by skidding.  Its wheel speeds are those
    # whose least-squares motion is the request; the slip is the least-squares residual
    # (numpy.linalg.lstsq as reference).
    from sim.files.robotfile import load_robot
    robot = load_robot(ROOT / "scenarios/robots/field-rover.yaml")
    sim = Simulator(robot, 0.01)
    for _ in range(300):
        row = sim.step(twist=(0.0, 0.0, 0.8))
    np.testing.assert_allclose(row.twist, [0.0, 0.0, 0.8], atol=1e-12)
    assert row.fit == 2
    a = robot.arrays
    rows, rhs = [], []
    for i in range(len(a.x)):
        h = a.heading[i]
        rows.append([math.cos(h), math.sin(h), a.x[i] * math.sin(h) - a.y[i] * math.cos(h)])
        rhs.append(a.radius[i] * row.spin[i])
    for i in range(len(a.x)):
        h = a.heading[i]
        rows.append([-math.sin(h), math.cos(h), a.x[i] * math.cos(h) + a.y[i] * math.sin(h)])
        rhs.append(0.0)
    xi, res, _, _ = np.linalg.lstsq(np.array(rows), np.array(rhs), rcond=None)
    np.testing.assert_allclose(xi, [0.0, 0.0, 0.8], atol=1e-12)
    assert row.slip == pytest.approx(math.sqrt(res[0]), rel=1e-9)
    # and the strict option keeps today's behaviour: projected, no turn
    strict = Simulator(robot, 0.01, skid=False)
    for _ in range(50):
        r2 = strict.step(twist=(0.0, 0.0, 0.8))
    assert r2.fit == 1 and r2.twist[2] == pytest.approx(0.0, abs=1e-12)
