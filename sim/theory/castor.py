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

import numpy as np


def flow_coefficients(x, y, trail, twist, dt):
    """The step map on ``(sin(s/2), cos(s/2))``, ``s = h - delta``: ``[[C, Sa], [Sb, C]]``.

    Shapes broadcast: ``x, y, trail`` (..., c), ``twist`` (..., 3) or (..., 1, 3).
    Returns ``(C, Sa, Sb, delta)``.
    """
    t = np.asarray(twist, dtype=float)
    vx, vy, w = t[..., 0], t[..., 1], t[..., 2]
    ax = vx - w * y
    ay = vy + w * x
    # n(h).v = -sin h ax + cos h ay = R cos(h - delta), delta = atan2(-ax, ay)
    delta = np.arctan2(-ax, ay)
    c = np.hypot(ax, ay) / trail
    # u = tan(s/2): du/dt = (a - b u^2)/2, a = c - w, b = c + w; flow of [p, q]' = [[0, a/2], [b/2, 0]] [p, q]
    a, b = c - w, c + w
    mu = a * b / 4.0
    root = np.sqrt(np.abs(mu))
    tau = root * dt
    pos, neg = mu > 1e-300, mu < -1e-300
    safe = np.where(root > 0, root, 1.0)
    C = np.where(pos, np.cosh(tau), np.where(neg, np.cos(tau), 1.0))
    Sf = np.where(pos, np.sinh(tau) / safe, np.where(neg, np.sin(tau) / safe, dt))
    return C, Sf * (a / 2.0), Sf * (b / 2.0), delta


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
    C, Sa, Sb, delta = flow_coefficients(x, y, trail, twist, dt)
    s = heading - delta
    p, q = np.sin(s / 2.0), np.cos(s / 2.0)
    s2 = 2.0 * np.arctan2(C * p + Sa * q, C * q + Sb * p)
    d = np.mod(s2 - s + np.pi, 2.0 * np.pi) - np.pi
    return heading + d
