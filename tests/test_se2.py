"""The SE(2) exponential the engine integrates poses with, against references outside the project.

* scipy.linalg.expm of the 3x3 se(2) matrix [[0, -w, vx], [w, 0, vy], [0, 0, 0]] dt: a body
  twist held for dt moves the body by that matrix exponential (Lynch & Park, Modern Robotics,
  2017, sec. 3.3, the exponential of a planar twist);
* mpmath at 40 digits for sin(phi)/phi and (1 - cos(phi))/phi, where the engine uses their
  Taylor series (|phi| below 1e-2): the series must be exact to rounding there.
"""
import math

import mpmath
import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from scipy.linalg import expm

from sim.theory.se2 import exp_increment, log_twist


def _reference(vx, vy, w, dt):
    m = np.array([[0.0, -w, vx], [w, 0.0, vy], [0.0, 0.0, 0.0]]) * dt
    e = expm(m)
    return e[0, 2], e[1, 2], math.atan2(e[1, 0], e[0, 0])


@settings(max_examples=200, deadline=None)
@given(st.floats(-3, 3), st.floats(-3, 3), st.floats(-6, 6), st.sampled_from([1e-4, 1e-3, 0.01, 0.5]))
def test_increment_is_the_matrix_exponential(vx, vy, w, dt):
    got = exp_increment(vx, vy, w, dt)
    want = _reference(vx, vy, w, dt)
    assert got == pytest.approx(want, rel=1e-12, abs=1e-15)


@pytest.mark.parametrize("phi", [1e-9, -3e-7, 1e-5, 9.9e-5, 1.01e-4, 6e-4, -2.5e-3, 9.99e-3, -9.99e-3])
def test_series_is_exact_to_rounding(phi):
    """Below |phi| = 1e-2 the engine sums the series; a 40-digit reference allows 2 ulp."""
    mpmath.mp.dps = 40
    sinc, cosc, _ = exp_increment(1.0, 0.0, phi, 1.0)
    want_s = mpmath.sin(phi) / phi
    want_c = (1 - mpmath.cos(phi)) / phi
    assert abs(sinc - float(want_s)) <= 2 * math.ulp(float(want_s))
    assert abs(cosc - float(want_c)) <= 2 * math.ulp(float(want_c))


@settings(max_examples=100, deadline=None)
@given(st.floats(-2, 2), st.floats(-2, 2), st.floats(-8, 8))
def test_log_inverts_the_exponential(vx, vy, w):
    dt = 0.02
    assert log_twist(*exp_increment(vx, vy, w, dt), dt) == pytest.approx((vx, vy, w), rel=1e-9, abs=1e-12)
