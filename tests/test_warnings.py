"""Plausibility warnings: allowed values that are probably not meant.

Printed as ``file:line: warning: ...`` on stderr; the exit code stays what it
would be without them.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg

from sim.files.robotfile import load_robot
from sim.files.scenario import load_scenario
from sim.theory.kinematics import COND_WARN, forward_conditioning

from conftest import ROBOTS, SCENARIOS

AXLE = """\
name: axle
wheels:
  - {name: left, type: fixed, x: 0.0, y: 0.22, radius: 0.08}
  - {name: right, type: fixed, x: 0.0, y: -0.22, radius: 0.08}
"""


def mecanum(rollers, l=0.2, w=0.17, r=0.05):
    """Four Swedish wheels at the corners (front left, front right, rear right, rear left), heading 0."""
    corners = ((l, w), (l, -w), (-l, -w), (-l, w))
    lines = ["name: quad", "wheels:"]
    for i, ((x, y), g) in enumerate(zip(corners, rollers)):
        lines.append(f"  - {{name: w{i}, type: swedish, x: {x}, y: {y}, radius: {r}, roller: {g} deg}}")
    return "\n".join(lines) + "\n"


def hand_inverse(rollers, l=0.2, w=0.17, r=0.05):
    """Spin per twist of Swedish wheels at heading 0 (Lynch & Park 2017, eq. 13.9, from memory):
    u_i = (1 / (r cos g_i)) [cos g_i, sin g_i, x_i sin g_i - y_i cos g_i] . (vx, vy, omega)."""
    corners = ((l, w), (l, -w), (-l, -w), (-l, w))
    rows = []
    for (x, y), g in zip(corners, rollers):
        g = math.radians(g)
        rows.append(np.array([math.cos(g), math.sin(g), x * math.sin(g) - y * math.cos(g)]) / (r * math.cos(g)))
    return np.array(rows)


def warnings_of(err):
    return [ln for ln in err.splitlines() if ": warning: " in ln]


def test_plain_angle_above_a_turn_is_warned_with_its_line(cli, write_files, tmp_path):
    p = write_files(tmp_path, {"r.yaml": AXLE + "  - {name: c, type: castor, x: 0.3, y: 0, radius: 0.04, "
                                              "trail: 0.03, heading: 90}\n"})["r.yaml"]
    code, out, err = cli(["analyze", p])
    assert code == 0 and "mobility" in out
    (w,) = warnings_of(err)
    assert w.startswith(f"{p}:5: warning: wheels[2].heading: 90 is read as 90 rad (5156.62 deg)")
    assert "did you mean '90 deg'?" in w
    assert load_robot(p).wheel("c").heading == 90.0          # still read as radians: a warning, not an error
    # written with a unit, or within a turn: no warning
    for text in ("heading: 90 deg", "heading: 6.0", "heading: '7 rad'"):
        q = write_files(tmp_path, {"q.yaml": AXLE + "  - {name: c, type: castor, x: 0.3, y: 0, radius: 0.04, "
                                                  f"trail: 0.03, {text}}}\n"})["q.yaml"]
        assert load_robot(q).warnings == (), text


def test_metres_warnings_for_radius_and_mount_point(cli, write_files, tmp_path):
    p = write_files(tmp_path, {"r.yaml": AXLE + "  - name: big\n    type: ball\n    x: 30\n    y: 4\n"
                                              "    radius: 80\n"})["r.yaml"]
    code, _, err = cli(["analyze", p])
    assert code == 0
    ws = warnings_of(err)
    assert len(ws) == 2
    assert ws[0].startswith(f"{p}:9: warning: wheels[2].radius: radius 80 m is larger than 1 m; values are metres")
    assert ws[1].startswith(f"{p}:7: warning: wheels[2].x: wheel 'big' is mounted 30.2655 m from the body origin")
    assert "beyond 20 m" in ws[1]


def test_mecanum_with_one_roller_sign_leaves_a_motion_uncontrolled(cli, write_files, tmp_path):
    p = write_files(tmp_path, {"m.yaml": mecanum((45, 45, 45, 45))})["m.yaml"]
    c = forward_conditioning(load_robot(p))
    assert math.isinf(c.number)
    # reference: scipy's null space of the hand-written inverse map is the uncontrolled motion
    ns = scipy.linalg.null_space(hand_inverse((45, 45, 45, 45)))
    assert ns.shape == (3, 1)
    assert abs(ns[:, 0] @ c.weak) == pytest.approx(np.linalg.norm(c.weak), abs=1e-12)   # the same line
    np.testing.assert_allclose(hand_inverse((45, 45, 45, 45)) @ c.weak, 0.0, atol=1e-12)
    np.testing.assert_allclose(c.weak, [math.sqrt(0.5), -math.sqrt(0.5), 0.0], atol=1e-12)
    code, _, err = cli(["analyze", p])
    assert code == 0
    (w,) = warnings_of(err)
    assert w.startswith(f"{p}:2: warning: wheels: the roller pattern leaves a motion uncontrolled")
    assert "vx 0.707 m/s, vy -0.707 m/s, omega 0.000 rad/s" in w and "condition number is infinite" in w


def test_mecanum_with_shallow_rollers_is_nearly_uncontrolled(write_files, tmp_path):
    rollers = (-4, 4, -4, 4)
    rb = load_robot(write_files(tmp_path, {"m.yaml": mecanum(rollers)})["m.yaml"])
    c = forward_conditioning(rb)
    # reference: scipy's singular values of the hand-written inverse map, omega weighted by the base size
    L = rb.size
    assert L == pytest.approx(math.hypot(0.2, 0.17))
    H = hand_inverse(rollers) @ np.diag([1.0, 1.0, 1.0 / L])
    s = scipy.linalg.svdvals(H)
    assert c.number == pytest.approx(s[0] / s[-1], rel=1e-12)
    assert 14.0 < c.number < 15.0 and c.number > COND_WARN
    _, _, vt = scipy.linalg.svd(H)
    weak = vt[-1] * np.sign(vt[-1][np.argmax(np.abs(vt[-1]))])
    np.testing.assert_allclose(c.weak, weak * [1.0, 1.0, 1.0 / L], atol=1e-12)
    np.testing.assert_allclose(c.weak, [0.0, 1.0, 0.0], atol=1e-12)     # sideways: the rollers barely see it
    (w,) = rb.warnings
    assert w.line == 2 and "nearly uncontrolled" in w.message and "14.3 (above 10)" in w.message
    assert "weak motion vx 0.000 m/s, vy 1.000 m/s, omega 0.000 rad/s" in w.message
    # the usual X pattern is well conditioned (sqrt 2 for a square layout measured by its size)
    good = load_robot(write_files(tmp_path, {"g.yaml": mecanum((-45, 45, -45, 45), l=0.2, w=0.2)})["g.yaml"])
    assert forward_conditioning(good).number == pytest.approx(math.sqrt(2), rel=1e-12) and good.warnings == ()


def test_bundled_robots_and_scenarios_give_no_warnings():
    for p in sorted(ROBOTS.glob("*.yaml")):
        assert load_robot(p).warnings == (), p.name
    for p in sorted(SCENARIOS.glob("*.yaml")):
        assert load_scenario(p).warnings == (), p.name


def test_scenario_warnings_leave_the_exit_code_alone(cli, write_files, tmp_path):
    files = write_files(tmp_path, {
        "robots/axle.yaml": AXLE,
        "s.yaml": """\
            robot: robots/axle.yaml
            step: 0.01
            duration: 1
            script:
              - at: 0
                twist: {vx: 0.1, omega: 30}
            checks:
              - slip_below: 0.001
            """})
    code, out, err = cli(["run", files["s.yaml"]])
    assert code == 0 and "PASS" in out
    (w,) = warnings_of(err)
    assert w.startswith(f"{files['s.yaml']}:6: warning: script[0].twist.omega: 30 is read as 30 rad/s")
    assert "did you mean '30 deg'?" in w
    # batch prints it too, and the scenario still passes
    code, out, err = cli(["batch", files["s.yaml"], "--jobs", "1"])
    assert code == 0 and warnings_of(err) == [w]
