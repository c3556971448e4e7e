"""The wheel equations of sim/constraints.py against the textbook polar form.

Reference: Siegwart, Nourbakhsh & Scaramuzza, "Introduction to Autonomous Mobile
Robots", 2nd ed. 2011, section 3.2 (and Campion, Bastin & d'Andrea-Novel 1996),
rows as stated in our issue 2 and from memory of that text:
with alpha, l the polar mount angle and distance, beta the wheel angle to the
chassis line and gamma the Swedish roller angle,

    rolling   [sin(a+b+g), -cos(a+b+g), -l cos(b+g)] R(theta) xi = r phidot cos g
    sliding   [cos(a+b),    sin(a+b),    l sin b   ] R(theta) xi = 0
    castor    [cos(a+b),    sin(a+b),    d + l sin b] R(theta) xi + d betadot = 0

Our rows act on the body twist R(theta) xi and use x = l cos a, y = l sin a and
heading = a + b - 90 deg.  A castor's heading is the textbook castor angle plus
180 deg (heading = a + b + 90 deg): positive spin rolls it away from its trail,
so a castor pulled forward settles at heading 0.  The trail d is the same
length; with the heading flipped, the whole castor equation changes sign, which
leaves the constraint itself unchanged (derived below).
"""
from __future__ import annotations

import math

import numpy as np
import pytest
import sympy as sp

from sim.theory import constraints as C

a, l, b, g, d = sp.symbols("alpha l beta gamma d", real=True)
vx, vy, w, bdot = sp.symbols("v_x v_y omega betadot", real=True)
XI = sp.Matrix([vx, vy, w])
X, Y = l * sp.cos(a), l * sp.sin(a)


def ours_rolling(x, y, h, gam):
    """Rolling row as documented in sim/constraints.py (x/y/heading form)."""
    return sp.Matrix([[sp.cos(h + gam), sp.sin(h + gam), x * sp.sin(h + gam) - y * sp.cos(h + gam)]])


def ours_sliding(x, y, h, trail=0):
    return sp.Matrix([[-sp.sin(h), sp.cos(h), x * sp.cos(h) + y * sp.sin(h) - trail]])


def _zero(expr) -> bool:
    return sp.simplify(sp.expand_trig(sp.simplify(expr))) == 0


def test_rolling_row_equals_textbook_symbolically():
    # Siegwart et al. 2011, section 3.2.3 (from memory): Swedish wheel rolling row; gamma = 0
    # gives the fixed/steered standard wheel rolling row.  heading = alpha + beta - 90 deg.
    text = sp.Matrix([[sp.sin(a + b + g), -sp.cos(a + b + g), -l * sp.cos(b + g)]])
    ours = ours_rolling(X, Y, a + b - sp.pi / 2, g)
    assert all(_zero(e) for e in (ours - text))
    # gamma = 0: the standard-wheel row
    text0 = sp.Matrix([[sp.sin(a + b), -sp.cos(a + b), -l * sp.cos(b)]])
    assert all(_zero(e) for e in (ours_rolling(X, Y, a + b - sp.pi / 2, 0) - text0))


def test_sliding_row_equals_textbook_symbolically():
    # Siegwart et al. 2011, section 3.2.3 (from memory): no sliding of fixed and steered
    # standard wheels.
    text = sp.Matrix([[sp.cos(a + b), sp.sin(a + b), l * sp.sin(b)]])
    ours = ours_sliding(X, Y, a + b - sp.pi / 2)
    assert all(_zero(e) for e in (ours - text))


def test_castor_equation_equals_textbook_symbolically():
    # Siegwart et al. 2011, section 3.2.3 (from memory): castor no-sliding with offset d and
    # steering rate betadot.
    # Ours: [-sin h, cos h, x cos h + y sin h - d] xi - d hdot = 0, with h = alpha + beta + 90 deg
    # (textbook castor angle + 180 deg), so hdot = betadot and the trail d is the same length.
    text = (sp.Matrix([[sp.cos(a + b), sp.sin(a + b), d + l * sp.sin(b)]]) * XI)[0] + d * bdot
    ours = (ours_sliding(X, Y, a + b + sp.pi / 2, d) * XI)[0] - d * bdot
    # the equations are negatives of each other: the same constraint
    assert _zero(ours + text)
    # and the rolling row of a castor, taken at its steering axis, is the standard one with
    # the heading flipped: positive spin in our convention is negative in the textbook's.
    text_roll = sp.Matrix([[sp.sin(a + b), -sp.cos(a + b), -l * sp.cos(b)]])
    ours_roll = ours_rolling(X, Y, a + b + sp.pi / 2, 0)
    assert all(_zero(e) for e in (ours_roll + text_roll))


def test_castor_row_is_no_sliding_of_the_trailing_contact():
    # Rigid-body kinematics (common practice): the contact lies d behind the steering axis
    # along the heading; its velocity across the wheel must vanish.
    h, x, y, hdot = sp.symbols("h x y hdot", real=True)
    cx, cy = x - d * sp.cos(h), y - d * sp.sin(h)
    # velocity of the contact in the body frame: body motion plus the swivel of the fork
    vcx = vx - w * cy + d * sp.sin(h) * hdot
    vcy = vy + w * cx - d * sp.cos(h) * hdot
    across = -sp.sin(h) * vcx + sp.cos(h) * vcy
    ours = (ours_sliding(x, y, h, d) * XI)[0] - d * hdot
    assert _zero(across - ours)


@pytest.mark.parametrize("seed", range(3))
def test_code_rows_match_textbook_numerically(seed, textbook):
    # The functions in sim/constraints.py evaluated against the textbook polar form
    # (Siegwart et al. 2011, section 3.2) at random mounts, angles and rollers.
    rng = np.random.default_rng(seed)
    n = 50
    x, y = rng.uniform(-1, 1, n), rng.uniform(-1, 1, n)
    h = rng.uniform(-math.pi, math.pi, n)
    gam = rng.uniform(-1.3, 1.3, n)
    trail = rng.uniform(0.01, 0.2, n)
    roll = C.rolling_rows(x, y, h, gam)
    slide = C.sliding_rows(x, y, h)
    cast = C.sliding_rows(x, y, h, trail)
    for i in range(n):
        np.testing.assert_allclose(roll[i], textbook.rolling(x[i], y[i], h[i], gam[i]), atol=1e-12)
        np.testing.assert_allclose(slide[i], textbook.sliding(x[i], y[i], h[i]), atol=1e-12)
        row, coef = textbook.castor(x[i], y[i], h[i], trail[i])
        # same constraint, opposite sign (heading flipped by 180 deg)
        np.testing.assert_allclose(cast[i], -row, atol=1e-12)
        assert coef == pytest.approx(trail[i])


def test_rolling_row_is_contact_velocity_along_roller_direction(textbook):
    # Rigid-body kinematics (common practice): the rolling row dotted with the twist is the
    # contact velocity projected on the direction heading + gamma.
    rng = np.random.default_rng(7)
    for _ in range(20):
        x, y, h, gam = rng.uniform(-1, 1), rng.uniform(-1, 1), rng.uniform(-3, 3), rng.uniform(-1, 1)
        xi = rng.normal(size=3)
        v = textbook.contact_velocity(x, y, xi)
        want = v @ np.array([math.cos(h + gam), math.sin(h + gam)])
        assert C.rolling_rows(x, y, h, gam) @ xi == pytest.approx(want, abs=1e-12)


def test_stack_blocks(robot_from_yaml, textbook):
    # Stacking as Campion et al. 1996 / Siegwart et al. 2011: J1 = [J1f; J1s(beta_s)],
    # C1 = [C1f; C1s(beta_s)], castors give C1c with C2 = diag(d) (both negated here, see below), ball wheels give nothing,
    # undriven wheels give no rolling row, J2 = diag(r cos gamma).
    robot = robot_from_yaml("""
        wheels:
          - {name: f1, type: fixed, x: 0.0, y: 0.3, radius: 0.1}
          - {name: f2, type: fixed, x: 0.0, y: -0.3, radius: 0.1, driven: false}
          - {name: s1, type: steered, x: 0.6, y: 0.0, radius: 0.12, heading: 20 deg}
          - {name: c1, type: castor, x: -0.4, y: 0.1, radius: 0.05, trail: 0.04, heading: 150 deg}
          - {name: o1, type: swedish, x: -0.4, y: -0.2, radius: 0.06, roller: 30 deg, heading: 10 deg}
          - {name: b1, type: ball, x: 0.3, y: 0.3, radius: 0.02}
    """)
    s = C.stack(robot)
    assert s.J1f_names == ("f1", "o1") and s.J1s_names == ("s1",)
    assert s.C1f_names == ("f1", "f2") and s.C1s_names == ("s1",) and s.C1c_names == ("c1",)
    r = math.radians
    np.testing.assert_allclose(s.J1f[0], textbook.rolling(0.0, 0.3, 0.0), atol=1e-12)
    np.testing.assert_allclose(s.J1f[1], textbook.rolling(-0.4, -0.2, r(10), r(30)), atol=1e-12)
    np.testing.assert_allclose(s.J1s[0], textbook.rolling(0.6, 0.0, r(20)), atol=1e-12)
    np.testing.assert_allclose(s.C1f[1], textbook.sliding(0.0, -0.3, 0.0), atol=1e-12)
    np.testing.assert_allclose(s.C1s[0], textbook.sliding(0.6, 0.0, r(20)), atol=1e-12)
    # the textbook castor equation T xi + d betadot = 0 with our row C1c = -T reads C1c xi - d hdot = 0,
    # so the steering-rate coefficient in C1c xi + C2 hdot = 0 is C2 = -d
    row, d = textbook.castor(-0.4, 0.1, r(150), 0.04)
    np.testing.assert_allclose(s.C1c[0], -row, atol=1e-12)
    np.testing.assert_allclose(s.C2, [-d])
    np.testing.assert_allclose(s.J2, [0.1, 0.06 * math.cos(r(30)), 0.12])
    assert s.J1.shape == (3, 3) and s.C1.shape == (3, 3)
    # at another steering the steered rows move and the fixed ones do not
    s2 = C.stack(robot, C.angles_with(robot, {"s1": r(-35)}))
    np.testing.assert_allclose(s2.C1s[0], textbook.sliding(0.6, 0.0, r(-35)), atol=1e-12)
    np.testing.assert_allclose(s2.C1f, s.C1f)
