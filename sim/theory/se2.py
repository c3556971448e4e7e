"""Planar rigid motions: the exact SE(2) exponential of a body twist.

Poses are ``(x, y, theta)`` in the world frame (m, m, rad); twists are
``(vx, vy, omega)`` in the body frame (m/s, m/s, rad/s).
"""
from __future__ import annotations

import numpy as np


def _sinc_cosc(phi):
    """sin(phi)/phi and (1 - cos(phi))/phi, exact to rounding near 0 (arrays)."""
    phi = np.asarray(phi, dtype=float)
    small = np.abs(phi) < 1e-4
    safe = np.where(small, 1.0, phi)
    p2 = phi * phi
    sinc = np.where(small, 1.0 - p2 / 6.0 + p2 * p2 / 120.0, np.sin(safe) / safe)
    cosc = np.where(small, phi / 2.0 - phi * p2 / 24.0 + phi * p2 * p2 / 720.0,
                    2.0 * np.sin(safe / 2.0) ** 2 / safe)
    return sinc, cosc


def body_increment(twist, dt):
    """Displacement over ``dt`` s of constant body twist(s), in the starting body frame.

    Parameters
    ----------
    twist : array_like, shape (..., 3)
    dt : float or array_like, shape (...)

    Returns
    -------
    ndarray, shape (..., 3)
        ``(dx, dy, dtheta)`` (m, m, rad): the exact exponential, so constant
        twists trace exact arcs.
    """
    t = np.asarray(twist, dtype=float)
    vx, vy, w = t[..., 0] * dt, t[..., 1] * dt, t[..., 2] * dt
    sinc, cosc = _sinc_cosc(w)
    return np.stack([vx * sinc - vy * cosc, vx * cosc + vy * sinc, w], axis=-1)


def compose(pose, inc):
    """World pose after a body-frame increment: ``pose (+) inc``, shapes (..., 3)."""
    pose = np.asarray(pose, dtype=float)
    inc = np.asarray(inc, dtype=float)
    c, s = np.cos(pose[..., 2]), np.sin(pose[..., 2])
    return np.stack([pose[..., 0] + c * inc[..., 0] - s * inc[..., 1],
                     pose[..., 1] + s * inc[..., 0] + c * inc[..., 1],
                     pose[..., 2] + inc[..., 2]], axis=-1)


def step_pose(pose, twist, dt):
    """Pose after holding body ``twist`` for ``dt`` s (exact), shape (3,)."""
    return compose(pose, body_increment(twist, dt))
