"""Passive castor swivel: exact heading update for a constant body twist.

A castor with steering axis at body point (x, y), heading h and trail d has
the no-sliding constraint (see :mod:`sim.constraints`)
``hdot = (n(h) . v_axis) / d - omega`` with ``n(h) = (-sin h, cos h)`` and
``v_axis`` the body-frame velocity of the axis.  For a constant twist this is
``hdot = c cos(h - delta) - omega``, a Riccati equation in ``tan((h-delta)/2)``
whose flow is a linear fractional map; it is applied to the vector
``(sin(s/2), cos(s/2))`` so no angle is singular.  Dragged straight from
``psi0`` it gives the tractrix ``tan(psi/2) = tan(psi0/2) exp(-v t / d)``.
"""
from __future__ import annotations

import math

import numpy as np

from sim.jit import physics
from sim.theory.constraints import point_velocity


@physics
def swivel_one(h, x, y, trail, vx, vy, w, dt):
    """Heading (rad) after ``dt`` s of body twist (vx, vy, w) of a castor with heading ``h``,
    steering axis (x, y) m and trail > 0 m; continuous with ``h`` (no wrapping).

    ``s = h - delta`` with ``n(h).v_axis = R cos(h - delta)``; ``u = tan(s/2)`` obeys
    ``du/dt = (a - b u^2) / 2`` with ``a = c - w``, ``b = c + w``, ``c = R / trail``, whose flow
    on ``(sin(s/2), cos(s/2))`` is the linear map ``[[C, Sa], [Sb, C]]`` (scaled by
    ``1/cosh`` when hyperbolic, so long steps cannot overflow).
    """
    ax, ay = point_velocity(x, y, vx, vy, w)
    delta = math.atan2(-ax, ay)
    c = math.hypot(ax, ay) / trail
    a, b = c - w, c + w
    mu = a * b / 4.0
    root = math.sqrt(abs(mu))
    tau = root * dt
    if mu > 1e-300:
        C, Sf = 1.0, math.tanh(tau) / root
    elif mu < -1e-300:
        C, Sf = math.cos(tau), math.sin(tau) / root
    else:
        C, Sf = 1.0, dt
    Sa, Sb = Sf * (a / 2.0), Sf * (b / 2.0)
    s = h - delta
    p, q = math.sin(s / 2.0), math.cos(s / 2.0)
    s2 = 2.0 * math.atan2(C * p + Sa * q, C * q + Sb * p)
    return h + ((s2 - s + math.pi) % (2.0 * math.pi) - math.pi)


@physics
def swivel_into(heading, x, y, trail, twist, dt, out):
    """:func:`swivel_one` for castors (k,) under twists (k, 3), into ``out`` (k,)."""
    for i in range(heading.shape[0]):
        out[i] = swivel_one(heading[i], x[i], y[i], trail[i], twist[i, 0], twist[i, 1], twist[i, 2], dt)


def swivel(heading, x, y, trail, twist, dt):
    """Castor headings after ``dt`` s of constant body ``twist``.

    Parameters
    ----------
    heading, x, y, trail : ndarray, shape (m,)
        rad, m, m, m (trail > 0).
    twist : array_like, shape (3,) or (m, 3)
    dt : float, s

    Returns
    -------
    ndarray, shape (m,), rad; continuous with ``heading`` (no wrapping).
    """
    h = np.asarray(heading, dtype=float)
    tw = np.ascontiguousarray(np.broadcast_to(np.asarray(twist, dtype=float), h.shape + (3,)))
    out = np.empty(h.shape)
    f = lambda a: np.ascontiguousarray(np.broadcast_to(np.asarray(a, dtype=float), h.shape))
    swivel_into(f(h), f(x), f(y), f(trail), tw, float(dt), out)
    return out
