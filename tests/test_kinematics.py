"""Forward and inverse kinematics against textbook matrices."""
from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg

from sim.theory.kinematics import choose_angles, forward, forward_matrix, inverse, inverse_matrix

MECANUM = """
    wheels:
      - {{name: w1, type: swedish, x: {l}, y: {w}, radius: {r}, roller: -45 deg}}
      - {{name: w2, type: swedish, x: {l}, y: -{w}, radius: {r}, roller: 45 deg}}
      - {{name: w3, type: swedish, x: -{l}, y: -{w}, radius: {r}, roller: -45 deg}}
      - {{name: w4, type: swedish, x: -{l}, y: {w}, radius: {r}, roller: 45 deg}}
"""


def lynch_park_H(l, w, r):
    """Lynch & Park 2017, "Modern Robotics", eq. (13.10) (from memory): wheel speeds
    u = H(0) V_b for V_b = (omega, vx, vy), wheels 1..4 at (l, w), (l, -w), (-l, -w), (-l, w)
    with rollers -45, 45, -45, 45 deg.  Returned with columns reordered to (vx, vy, omega)."""
    H = np.array([[-l - w, 1, -1],
                  [l + w, 1, 1],
                  [l + w, 1, -1],
                  [-l - w, 1, 1]]) / r
    return H[:, [1, 2, 0]]


@pytest.mark.parametrize("l,w,r", [(0.2, 0.17, 0.05), (0.35, 0.25, 0.076), (0.1, 0.3, 0.03)])
def test_mecanum_inverse_is_lynch_park_13_10(l, w, r, robot_from_yaml):
    robot = robot_from_yaml(MECANUM.format(l=l, w=w, r=r))
    K, idx = inverse_matrix(robot, robot.arrays.heading)
    assert list(idx) == [0, 1, 2, 3]
    np.testing.assert_allclose(K, lynch_park_H(l, w, r), atol=1e-12)
    # the per-twist inverse gives the same spins (no limits: no projection, no scaling)
    rng = np.random.default_rng(3)
    for _ in range(5):
        xi = rng.normal(size=3)
        ik = inverse(robot, xi, robot.arrays.heading)
        np.testing.assert_allclose(ik.spin, lynch_park_H(l, w, r) @ xi, atol=1e-12)
        np.testing.assert_allclose(ik.shortfall, 0.0, atol=1e-12)
        assert ik.scale == 1.0


@pytest.mark.parametrize("l,w,r", [(0.2, 0.17, 0.05), (0.35, 0.25, 0.076)])
def test_mecanum_forward_is_pseudo_inverse(l, w, r, robot_from_yaml):
    # Lynch & Park 2017, section 13.4 (from memory): odometry V_b = F delta-theta with
    # F = H(0)^+ (the pseudo-inverse), here from scipy.linalg.pinv.
    robot = robot_from_yaml(MECANUM.format(l=l, w=w, r=r))
    F, idx = forward_matrix(robot, robot.arrays.heading)
    np.testing.assert_allclose(F, scipy.linalg.pinv(lynch_park_H(l, w, r)), atol=1e-12)
    # (r/4) [[1, 1, 1, 1], [-1, 1, -1, 1], [-1/(l+w), 1/(l+w), 1/(l+w), -1/(l+w)]] (from memory)
    want = r / 4 * np.array([[1, 1, 1, 1], [-1, 1, -1, 1],
                             [-1 / (l + w), 1 / (l + w), 1 / (l + w), -1 / (l + w)]])
    np.testing.assert_allclose(F, want, atol=1e-12)


def test_forward_consistent_spins_have_zero_slip(robot_from_yaml):
    robot = robot_from_yaml(MECANUM.format(l=0.2, w=0.17, r=0.05))
    xi = np.array([0.3, -0.2, 0.7])
    spin = lynch_park_H(0.2, 0.17, 0.05) @ xi
    fw = forward(robot, robot.arrays.heading, spin)
    np.testing.assert_allclose(fw.twist, xi, atol=1e-12)
    assert fw.slip < 1e-12 and fw.rank == 3


def test_diff_drive_forward_closed_form(robot_from_yaml):
    # Differential drive (common practice): v = r (wR + wL) / 2, omega = r (wR - wL) / b.
    r, b = 0.08, 0.44
    robot = robot_from_yaml(f"""
        wheels:
          - {{name: left, type: fixed, x: 0.0, y: {b / 2}, radius: {r}}}
          - {{name: right, type: fixed, x: 0.0, y: {-b / 2}, radius: {r}}}
    """)
    for wl, wr in [(4.0, 5.0), (-3.0, 3.0), (2.5, 2.5)]:
        fw = forward(robot, robot.arrays.heading, [wl, wr])
        np.testing.assert_allclose(fw.twist, [r * (wr + wl) / 2, 0.0, r * (wr - wl) / b], atol=1e-12)
        assert fw.slip < 1e-12


def test_skid_steer_least_squares_matches_scipy(robot_from_yaml, textbook):
    # Inconsistent spins: the twist is the least-squares solution of rolling and no-sliding
    # rows (issue 3), here checked with scipy.linalg.lstsq on the textbook rows.
    wheels = [(0.35, 0.33), (0.0, 0.33), (-0.35, 0.33), (0.35, -0.33), (0.0, -0.33), (-0.35, -0.33)]
    text = "wheels:\n" + "\n".join(
        f"  - {{name: w{i}, type: fixed, x: {x}, y: {y}, radius: 0.12}}" for i, (x, y) in enumerate(wheels))
    robot = robot_from_yaml(text)
    spin = np.array([3.0, 3.0, 3.0, 6.0, 6.0, 6.0])
    fw = forward(robot, robot.arrays.heading, spin)
    A = np.array([textbook.rolling(x, y, 0.0) for x, y in wheels] + [textbook.sliding(x, y, 0.0) for x, y in wheels])
    rhs = np.concatenate([0.12 * spin, np.zeros(6)])
    want = scipy.linalg.lstsq(A, rhs)[0]
    np.testing.assert_allclose(fw.twist, want, atol=1e-12)
    assert fw.slip == pytest.approx(np.linalg.norm(A @ want - rhs), rel=1e-9)


def test_car_inverse_gives_ackermann_angles(car_robot):
    # Ackermann geometry (from memory; standard vehicle-dynamics texts): for a turn of radius R
    # about a point on the rear axle line, tan(inner) = L / (R - t/2), tan(outer) = L / (R + t/2),
    # so cot(outer) - cot(inner) = t / L.
    L, t = 0.8, 0.6
    robot = car_robot(L, t)
    for R in (2.0, 1.2, 5.0):
        ik = inverse(robot, (0.6, 0.0, 0.6 / R), robot.arrays.heading)
        inner, outer = ik.steer[2], ik.steer[3]
        assert inner == pytest.approx(math.atan(L / (R - t / 2)), abs=1e-12)
        assert outer == pytest.approx(math.atan(L / (R + t / 2)), abs=1e-12)
        assert 1 / math.tan(outer) - 1 / math.tan(inner) == pytest.approx(t / L, abs=1e-12)
        # rear wheels: v (1 -+ t / (2R)) / r (common practice)
        np.testing.assert_allclose(ik.spin[:2], [0.6 * (1 - t / (2 * R)) / 0.15, 0.6 * (1 + t / (2 * R)) / 0.15])


def test_diff_drive_sideways_request_is_projected(robot_from_yaml):
    robot = robot_from_yaml("""
        wheels:
          - {name: left, type: fixed, x: 0.0, y: 0.2, radius: 0.1}
          - {name: right, type: fixed, x: 0.0, y: -0.2, radius: 0.1}
    """)
    ik = inverse(robot, (0.3, 0.25, 0.5), robot.arrays.heading)
    # axle on the y axis: admissible twists are (vx, 0, omega); the nearest drops vy
    np.testing.assert_allclose(ik.twist, [0.3, 0.0, 0.5], atol=1e-12)
    np.testing.assert_allclose(ik.shortfall, [0.0, 0.25, 0.0], atol=1e-12)
    np.testing.assert_allclose(ik.spin, [(0.3 - 0.2 * 0.5) / 0.1, (0.3 + 0.2 * 0.5) / 0.1], atol=1e-12)


def test_max_spin_scaling_keeps_curvature(robot_from_yaml):
    robot = robot_from_yaml("""
        wheels:
          - {name: left, type: fixed, x: 0.0, y: 0.2, radius: 0.1, max_spin: 5}
          - {name: right, type: fixed, x: 0.0, y: -0.2, radius: 0.1, max_spin: 5}
    """)
    ik = inverse(robot, (1.0, 0.0, 0.5), robot.arrays.heading)
    # unscaled: right wheel (1 + 0.1) / 0.1 = 11 rad/s; scaled by 5/11
    assert ik.scale == pytest.approx(5 / 11)
    assert max(abs(ik.spin)) == pytest.approx(5.0)
    assert ik.twist[0] / ik.twist[2] == pytest.approx(2.0)  # radius of curvature kept


def test_choose_angle_nearer_of_angle_and_opposite():
    inf = math.inf
    # target 170 deg from 0 deg: -10 deg with the spin reversed is nearer
    ang, sign = choose_angles(np.array([math.radians(170)]), np.array([0.0]), -inf, inf)
    assert ang[0] == pytest.approx(math.radians(-10)) and sign[0] == -1
    # limits [-5, 5] deg... -10 is out, 170 is out: the candidate nearest the limits is chosen
    ang, sign = choose_angles(np.array([math.radians(170)]), np.array([0.0]),
                              np.array([math.radians(-5)]), np.array([math.radians(5)]))
    assert ang[0] == pytest.approx(math.radians(-10)) and sign[0] == -1
    # limits [0, 200] deg: only 170 lies within
    ang, sign = choose_angles(np.array([math.radians(170)]), np.array([0.0]),
                              np.array([0.0]), np.array([math.radians(200)]))
    assert ang[0] == pytest.approx(math.radians(170)) and sign[0] == 1
    # continuity: from 350 deg a target of 10 deg is reached as 370 deg
    ang, sign = choose_angles(np.array([math.radians(10)]), np.array([math.radians(350)]), -inf, inf)
    assert ang[0] == pytest.approx(math.radians(370)) and sign[0] == 1


def test_steered_wheel_holds_angle_when_contact_still(robot_from_yaml):
    # Turning on the spot about a steered wheel's axis leaves its angle undefined: it holds.
    robot = robot_from_yaml("""
        wheels:
          - {name: s, type: steered, x: 0.0, y: 0.0, radius: 0.1, heading: 33 deg}
          - {name: t, type: steered, x: 0.5, y: 0.0, radius: 0.1}
    """)
    ik = inverse(robot, (0.0, 0.0, 1.0), robot.arrays.heading)
    assert ik.steer[0] == pytest.approx(math.radians(33))
    assert ik.spin[0] == pytest.approx(0.0, abs=1e-12)
    assert ik.steer[1] == pytest.approx(math.pi / 2)
