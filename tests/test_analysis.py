"""Degrees of mobility / steerability / maneuverability, ICR locus, redundancy.

References: Campion, Bastin & d'Andrea-Novel 1996 ("Structural properties and
classification of kinematic and dynamic models of wheeled mobile robots") and
Siegwart, Nourbakhsh & Scaramuzza 2011, section 3.3 (from memory of both): the
five classes (mobility, steerability) = (3,0) omnidirectional, (2,0)
differential, (2,1) omni-steer, (1,1) tricycle/car, (1,2) two-steer;
mobility = 3 - rank C1*(beta_s); a base whose fixed wheels' axles do not meet in
one point cannot move; with mobility 2 the ICR lies on the fixed axle line.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from sim.theory.analysis import analyze

S3 = math.sqrt(3.0)


def _tri(r, kind, extra="", heading_offset=90.0):
    """Three wheels at 120 deg spacing on radius r, heading tangential (+ offset)."""
    rows = []
    for i, phi in enumerate((0.0, 120.0, 240.0)):
        p = math.radians(phi)
        rows.append(f"  - {{name: w{i}, type: {kind}, x: {r * math.cos(p)!r}, y: {r * math.sin(p)!r}, "
                    f"heading: {phi + heading_offset} deg, radius: 0.05{extra}}}")
    return "wheels:\n" + "\n".join(rows) + "\n"


# (name, yaml, (mobility, steerability)) -- classes of Campion et al. 1996 / Siegwart et al. 2011.
CLASS_LAYOUTS = [
    # (3, 0) omnidirectional
    ("three omni wheels", _tri(0.25, "swedish", ", roller: 0 deg"), (3, 0)),
    ("four mecanum wheels", """
        wheels:
          - {name: fl, type: swedish, x: 0.2, y: 0.17, radius: 0.05, roller: -45 deg}
          - {name: fr, type: swedish, x: 0.2, y: -0.17, radius: 0.05, roller: 45 deg}
          - {name: rr, type: swedish, x: -0.2, y: -0.17, radius: 0.05, roller: -45 deg}
          - {name: rl, type: swedish, x: -0.2, y: 0.17, radius: 0.05, roller: 45 deg}
    """, (3, 0)),
    ("three ball wheels", _tri(0.3, "ball"), (3, 0)),
    # (2, 0) differential drive
    ("diff drive + two castors", """
        wheels:
          - {name: left, type: fixed, x: 0.0, y: 0.22, radius: 0.08}
          - {name: right, type: fixed, x: 0.0, y: -0.22, radius: 0.08}
          - {name: cf, type: castor, x: 0.28, y: 0.0, radius: 0.04, trail: 0.03}
          - {name: cr, type: castor, x: -0.28, y: 0.0, radius: 0.04, trail: 0.03}
    """, (2, 0)),
    ("sideways axle + ball", """
        wheels:
          - {name: a, type: fixed, x: 0.3, y: 0.1, heading: 90 deg, radius: 0.1}
          - {name: b, type: fixed, x: -0.2, y: 0.1, heading: 90 deg, radius: 0.1}
          - {name: ball, type: ball, x: 0.0, y: -0.4, radius: 0.03}
    """, (2, 0)),
    ("axle + driven omni wheel", """
        wheels:
          - {name: l, type: fixed, x: -0.1, y: 0.25, radius: 0.1}
          - {name: r, type: fixed, x: -0.1, y: -0.25, radius: 0.1}
          - {name: o, type: swedish, x: 0.4, y: 0.0, heading: 90 deg, radius: 0.05, roller: 0 deg}
    """, (2, 0)),
    # (2, 1) omni-steer
    ("steered wheel + two castors", """
        wheels:
          - {name: s, type: steered, x: 0.3, y: 0.0, radius: 0.1}
          - {name: c1, type: castor, x: -0.2, y: 0.2, radius: 0.05, trail: 0.03}
          - {name: c2, type: castor, x: -0.2, y: -0.2, radius: 0.05, trail: 0.03}
    """, (2, 1)),
    ("steered wheel + ball units", """
        wheels:
          - {name: s, type: steered, x: 0.0, y: 0.25, radius: 0.1, heading: 40 deg}
          - {name: b1, type: ball, x: 0.3, y: -0.2, radius: 0.03}
          - {name: b2, type: ball, x: -0.3, y: -0.2, radius: 0.03}
    """, (2, 1)),
    # (1, 1) tricycle / car
    ("car, steered front pair", """
        wheels:
          - {name: rl, type: fixed, x: 0.0, y: 0.3, radius: 0.15}
          - {name: rr, type: fixed, x: 0.0, y: -0.3, radius: 0.15}
          - {name: fl, type: steered, x: 0.8, y: 0.3, radius: 0.15, driven: false}
          - {name: fr, type: steered, x: 0.8, y: -0.3, radius: 0.15, driven: false}
    """, (1, 1)),
    ("tricycle, driven steered nose", """
        wheels:
          - {name: nose, type: steered, x: 0.45, y: 0.0, radius: 0.1}
          - {name: ll, type: fixed, x: 0.0, y: 0.22, radius: 0.04, driven: false}
          - {name: lr, type: fixed, x: 0.0, y: -0.22, radius: 0.04, driven: false}
    """, (1, 1)),
    ("bicycle", """
        wheels:
          - {name: front, type: steered, x: 0.5, y: 0.0, radius: 0.3, driven: false}
          - {name: rear, type: fixed, x: -0.5, y: 0.0, radius: 0.3}
    """, (1, 1)),
    # (1, 2) two-steer
    ("two steered + castor", """
        wheels:
          - {name: s1, type: steered, x: 0.3, y: 0.0, radius: 0.1}
          - {name: s2, type: steered, x: -0.3, y: 0.0, radius: 0.1}
          - {name: c, type: castor, x: 0.0, y: 0.3, radius: 0.05, trail: 0.03}
    """, (1, 2)),
    ("four steered modules", """
        wheels:
          - {name: fl, type: steered, x: 0.35, y: 0.25, radius: 0.075}
          - {name: fr, type: steered, x: 0.35, y: -0.25, radius: 0.075}
          - {name: rl, type: steered, x: -0.35, y: 0.25, radius: 0.075}
          - {name: rr, type: steered, x: -0.35, y: -0.25, radius: 0.075}
    """, (1, 2)),
]


def _layout(name):
    return next(text for n, text, _ in CLASS_LAYOUTS if n == name)


def _admissible_c1(robot, textbook, rng):
    """C1*(beta_s) at a random admissible steering, built from the textbook rows.

    Admissible twists: null space of C1f (scipy).  Each steered wheel points along its
    contact velocity for a random such twist (rigid-body kinematics, common practice).
    """
    fixed = [w for w in robot.wheels if w.type == "fixed"]
    steered = [w for w in robot.wheels if w.type == "steered"]
    C1f = np.array([textbook.sliding(w.x, w.y, w.heading) for w in fixed]).reshape(-1, 3)
    N = scipy.linalg.null_space(C1f) if len(C1f) else np.eye(3)
    xi = N @ rng.normal(size=N.shape[1])
    rows = list(C1f)
    for w in steered:
        v = textbook.contact_velocity(w.x, w.y, xi)
        rows.append(textbook.sliding(w.x, w.y, math.atan2(v[1], v[0])))
    return C1f, np.array(rows).reshape(-1, 3), N


@pytest.mark.parametrize("name,text,expected", CLASS_LAYOUTS, ids=[c[0] for c in CLASS_LAYOUTS])
def test_five_classes(name, text, expected, robot_from_yaml):
    # Campion et al. 1996 / Siegwart et al. 2011 (from memory): class table above.
    A = analyze(robot_from_yaml(text))
    assert (A.mobility, A.steerability) == expected
    assert A.maneuverability == sum(expected)
    assert A.omnidirectional == (expected == (3, 0))


def test_every_class_has_two_layouts():
    seen = {}
    for name, _, cls in CLASS_LAYOUTS:
        seen.setdefault(cls, set()).add(name)
    assert set(seen) == {(3, 0), (2, 0), (2, 1), (1, 1), (1, 2)}
    assert all(len(v) >= 2 for v in seen.values())


@pytest.mark.parametrize("name,text,expected", CLASS_LAYOUTS, ids=[c[0] for c in CLASS_LAYOUTS])
def test_ranks_agree_with_scipy_null_space(name, text, expected, robot_from_yaml, textbook):
    # mobility = dim null C1*(beta_s) (Campion et al. 1996), computed with scipy.linalg.null_space
    # on textbook rows at random admissible steerings; the independent steering freedom is what
    # the steered rows add to the rank, rank C1* - rank C1f (Campion's rank C1s when the steered
    # rows are independent of the fixed ones, and 1 for Ackermann-coupled pairs as Siegwart et
    # al. 2011 argue for the car).
    robot = robot_from_yaml(text)
    A = analyze(robot)
    rng = np.random.default_rng(11)
    for _ in range(3):
        C1f, C1, N = _admissible_c1(robot, textbook, rng)
        dm = scipy.linalg.null_space(C1).shape[1] if len(C1) else 3
        rank_c1 = 3 - dm
        rank_c1f = 3 - N.shape[1]
        assert A.mobility == dm
        assert A.steerability == rank_c1 - rank_c1f


def test_three_ball_wheels_are_omnidirectional(robot_from_yaml):
    # A base of only ball wheels has no constraint rows at all (Siegwart et al. 2011: the
    # spherical wheel imposes no constraint), so every twist is admissible: mobility 3.
    A = analyze(robot_from_yaml(_tri(0.3, "ball")))
    assert A.mobility == 3 and A.steerability == 0 and A.omnidirectional
    assert A.icr["kind"] == "plane"
    assert len(A.uncontrolled) == 3  # and no wheel drives any of it
    assert any("no wheel is driven" in w for w in A.warnings)


NOT_CONCURRENT = [
    # axles x = 0, y = 0.2 and x + y = 1: pairwise crossings (0, 0.2), (0, 1), (0.8, 0.2)
    """
    wheels:
      - {name: a, type: fixed, x: 0.0, y: 0.3, radius: 0.1}
      - {name: b, type: fixed, x: 0.5, y: 0.2, heading: 90 deg, radius: 0.1}
      - {name: c, type: fixed, x: 0.5, y: 0.5, heading: 45 deg, radius: 0.1}
    """,
    # three wheels at 120 deg spacing with headings tilted 30 deg off the tangent: the axles
    # form a triangle around the centre instead of meeting in it
    _tri(0.3, "fixed", heading_offset=60.0),
]


@pytest.mark.parametrize("text", NOT_CONCURRENT, ids=["three lines", "tilted triangle"])
def test_axles_not_concurrent_cannot_move(text, robot_from_yaml, textbook):
    # Siegwart et al. 2011 (from memory): fixed wheels whose axles do not meet in one point
    # admit no motion: rank C1f = 3 (scipy null space empty), mobility 0.
    robot = robot_from_yaml(text)
    C1f = np.array([textbook.sliding(w.x, w.y, w.heading) for w in robot.wheels])
    assert scipy.linalg.null_space(C1f).shape[1] == 0
    A = analyze(robot)
    assert A.mobility == 0 and A.maneuverability == 0
    assert A.icr["kind"] == "none"


def test_axles_concurrent_turn_about_the_common_point(robot_from_yaml):
    # The same three fixed wheels mounted tangentially: axles all radial, meeting at the
    # centre, so the only motion is rotation about it (mobility 1, ICR fixed at the centre).
    A = analyze(robot_from_yaml(_tri(0.3, "fixed")))
    assert A.mobility == 1
    assert A.icr["kind"] == "point"
    np.testing.assert_allclose(A.icr["point"], [0.0, 0.0], atol=1e-6)


def _axle_layout(px, py, heading_deg, half_track):
    h = math.radians(heading_deg)
    ux, uy = -math.sin(h), math.cos(h)   # axle direction (left of the rolling direction)
    return f"""
        wheels:
          - {{name: a, type: fixed, x: {px + half_track * ux!r}, y: {py + half_track * uy!r}, heading: {heading_deg} deg, radius: 0.1}}
          - {{name: b, type: fixed, x: {px - half_track * ux!r}, y: {py - half_track * uy!r}, heading: {heading_deg} deg, radius: 0.1}}
          - {{name: c, type: castor, x: {px + 0.5 * math.cos(h)!r}, y: {py + 0.5 * math.sin(h)!r}, radius: 0.04, trail: 0.03}}
    """, h


@pytest.mark.parametrize("px,py,heading", [(0.0, 0.0, 0.0), (0.1, 0.05, 30.0), (-0.2, 0.3, 90.0),
                                           (0.25, -0.1, -120.0)])
def test_mobility_two_icr_on_axle_line(px, py, heading, robot_from_yaml):
    # Mobility 2 (one fixed axle): the ICR lies on the axle line (Siegwart et al. 2011, from
    # memory).  The axle through (px, py) perpendicular to the heading h is
    # cos(h) x + sin(h) y = cos(h) px + sin(h) py (analytic geometry).
    text, h = _axle_layout(px, py, heading, 0.2)
    robot = robot_from_yaml(text)
    A = analyze(robot)
    assert A.mobility == 2 and A.icr["kind"] == "line"
    line = A.icr["line"]
    got = np.array([line["a"], line["b"], line["c"]])
    want = np.array([math.cos(h), math.sin(h), math.cos(h) * px + math.sin(h) * py])
    sign = np.sign(got @ want)
    np.testing.assert_allclose(sign * got, want, atol=2e-6)
    # and the engine's ICR of an unequal-spin motion lies on that line (row 1: the first with
    # motion; its ICR in the body frame from the twist)
    from sim.engine.simulator import Simulator
    sim = Simulator(robot, 0.01)
    sim.step(wheels={"a": 3.0, "b": 1.0})
    vx, vy, w = sim.step().twist
    ix, iy = -vy / w, vx / w
    assert math.cos(h) * ix + math.sin(h) * iy == pytest.approx(want[2], abs=1e-9)


def test_degrees_at_generic_steering_not_file_angles(robot_from_yaml):
    # Two steered wheels on the body x axis both starting at 90 deg: their axles coincide, so at
    # the file's angles the ICR is free along that line (mobility 2).  At a generic admissible
    # steering the two-steer base has (1, 2) (Campion et al. 1996, from memory).
    text = """
        wheels:
          - {name: s1, type: steered, x: 0.3, y: 0.0, heading: 90 deg, radius: 0.1}
          - {name: s2, type: steered, x: -0.3, y: 0.0, heading: 90 deg, radius: 0.1}
          - {name: c, type: castor, x: 0.0, y: 0.3, radius: 0.05, trail: 0.03}
    """
    robot = robot_from_yaml(text)
    rows = np.array([[-1.0, 0.0, 0.0], [-1.0, 0.0, 0.0]])  # both axles along y = 0
    assert scipy.linalg.null_space(rows).shape[1] == 2
    A = analyze(robot)
    assert (A.mobility, A.steerability) == (1, 2)
    assert set(A.generic_steer) == {"s1", "s2"}
    assert any("coincide" in s for s in A.singularities)


def test_car_steerability_one_not_two(robot_from_yaml):
    # Two steered front wheels tied by the rear axle through the ICR count once (issue 2;
    # Siegwart et al. 2011 car example).
    A = analyze(robot_from_yaml(_layout("car, steered front pair")))
    assert A.steerability == 1
    # the ICR locus is the rear axle line x = 0
    assert A.icr["kind"] == "line"
    assert abs(A.icr["line"]["a"]) == pytest.approx(1.0) and A.icr["line"]["c"] == pytest.approx(0.0, abs=1e-9)


def test_skid_steer_redundancy_relation(robot_from_yaml):
    # Six-wheel skid steer: three parallel axles meet only at infinity, so without skidding the
    # base can only drive straight (mobility 1) and all six wheels must turn at one speed
    # (common practice): five drives are redundant, each equal to the first.
    robot = robot_from_yaml("""
        wheels:
          - {name: lf, type: fixed, x: 0.35, y: 0.33, radius: 0.12}
          - {name: lm, type: fixed, x: 0.0, y: 0.33, radius: 0.12}
          - {name: lr, type: fixed, x: -0.35, y: 0.33, radius: 0.12}
          - {name: rf, type: fixed, x: 0.35, y: -0.33, radius: 0.12}
          - {name: rm, type: fixed, x: 0.0, y: -0.33, radius: 0.12}
          - {name: rr, type: fixed, x: -0.35, y: -0.33, radius: 0.12}
    """)
    A = analyze(robot)
    assert A.mobility == 1 and A.icr["kind"] == "infinity"
    np.testing.assert_allclose(A.icr["direction"], [1.0, 0.0], atol=1e-9)
    assert len(A.redundant) == 5  # one motion, six drives
    assert A.uncontrolled == []
    for rel in A.relations:
        lhs, rhs = rel.split(" = ")
        assert rhs.strip() == "+1*lf"


def test_uncontrolled_rotation_of_lone_steered_drive(robot_from_yaml):
    # One driven steered wheel with passive ball units: the base can rotate about that wheel's
    # contact point without any drive noticing (rigid-body kinematics, common practice).
    A = analyze(robot_from_yaml(_layout("steered wheel + ball units")))
    assert len(A.uncontrolled) == 1
    u = A.uncontrolled[0]
    # rotation about (0, 0.25): twist proportional to (0.25, 0, 1) (omega * (p_y, -p_x, 1))
    t = np.array([u["vx"], u["vy"], u["omega"]])
    np.testing.assert_allclose(t / t[2], [0.25, 0.0, 1.0], atol=1e-6)


# ---- properties -------------------------------------------------------------------------

_wheel = st.fixed_dictionaries({
    "type": st.sampled_from(["fixed", "steered", "castor", "swedish", "ball"]),
    "x": st.floats(-1, 1, allow_nan=False).map(lambda v: round(v, 3)),
    "y": st.floats(-1, 1, allow_nan=False).map(lambda v: round(v, 3)),
    "heading": st.integers(-180, 180),
    "roller": st.sampled_from([-45, 0, 30, 45, 60]),
    "driven": st.booleans(),
})


def _layout_text(wheels):
    lines = ["wheels:"]
    for i, w in enumerate(wheels):
        extra = ""
        if w["type"] == "castor":
            extra = ", trail: 0.03"
        elif w["type"] == "swedish":
            extra = f", roller: {w['roller']} deg"
        driven = "false" if w["type"] == "ball" else str(w["driven"]).lower()
        lines.append(f"  - {{name: w{i}, type: {w['type']}, x: {w['x']}, y: {w['y']}, "
                     f"heading: {w['heading']} deg, radius: 0.05, driven: {driven}{extra}}}")
    return "\n".join(lines) + "\n"


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(_wheel, min_size=1, max_size=6))
def test_random_layouts_never_crash(robot_from_yaml, wheels):
    # Campion et al. 1996: 0 <= mobility <= 3 and mobility + steerability <= 3 (and, for a base
    # that moves, steerability <= 2).
    robot = robot_from_yaml(_layout_text(wheels))
    A = analyze(robot)
    for v in (A.mobility, A.steerability, A.maneuverability):
        assert isinstance(v, int) and not isinstance(v, bool)
        assert 0 <= v <= 3
    assert A.mobility + A.steerability == A.maneuverability <= 3
    assert A.steerability <= 2
    # mobility can never exceed what the fixed wheels allow (scipy null space of C1f)
    C1f = np.array([[-math.sin(w.heading), math.cos(w.heading), w.x * math.cos(w.heading) + w.y * math.sin(w.heading)]
                    for w in robot.wheels if w.type == "fixed"]).reshape(-1, 3)
    k = scipy.linalg.null_space(C1f).shape[1] if len(C1f) else 3
    assert A.mobility <= k
    assert A.as_dict()["mobility"] == A.mobility
