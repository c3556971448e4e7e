"""Planar rigid motions: the exact SE(2) exponential of a body twist, pose composition, angle wrapping.

Poses are ``(x, y, theta)`` in the world frame (m, m, rad); twists are
``(vx, vy, omega)`` in the body frame (m/s, m/s, rad/s).  The scalar functions
are the one definition (:func:`sim.jit.physics`: the engine compiles them);
the array functions loop over them.
"""
from __future__ import annotations

import math

import numpy as np

from sim.jit import physics


@physics
def wrap(a):
    """Angle(s) ``a`` (rad, scalar or array) wrapped to [-pi, pi)."""
    return (a + math.pi) % (2.0 * math.pi) - math.pi


@physics
def exp_increment(vx, vy, w, dt):
    """Displacement ``(dx, dy, dtheta)`` (m, m, rad), in the starting body frame, after
    holding body twist (vx, vy, w) for ``dt`` s: the exact exponential (constant twists
    trace exact arcs).  Below |w dt| = 1e-2 (every step of a base turning under 10 rad/s
    at 1 ms) the Taylor series of sin(phi)/phi and (1 - cos(phi))/phi to phi^6 and phi^7:
    the first term left out is below 3e-22 relative, so the series is exact to rounding
    and saves the two sines."""
    ax, ay, phi = vx * dt, vy * dt, w * dt
    if abs(phi) < 1e-2:
        p2 = phi * phi
        sinc = 1.0 - p2 / 6.0 * (1.0 - p2 / 20.0 * (1.0 - p2 / 42.0))
        cosc = phi / 2.0 * (1.0 - p2 / 12.0 * (1.0 - p2 / 30.0 * (1.0 - p2 / 56.0)))
    else:
        sinc = math.sin(phi) / phi
        h = math.sin(phi / 2.0)
        cosc = 2.0 * h * h / phi
    return ax * sinc - ay * cosc, ax * cosc + ay * sinc, phi


@physics
def log_twist(dx, dy, dth, dt):
    """The body twist (vx, vy, w) that, held for ``dt`` s, gives the body-frame increment
    (dx, dy, dth) (m, m, rad): the inverse of :func:`exp_increment` (the SE(2) logarithm over dt).
    The increment is ``V (v dt)`` with ``V = [[sinc, -cosc], [cosc, sinc]]`` of ``dth``."""
    sinc, cosc, _ = exp_increment(1.0, 0.0, dth, 1.0)   # V's first column (unit speed for 1 s)
    det = sinc * sinc + cosc * cosc
    return (sinc * dx + cosc * dy) / det / dt, (-cosc * dx + sinc * dy) / det / dt, dth / dt


@physics
def compose(x, y, th, dx, dy, dth):
    """World pose after body-frame increment (dx, dy, dth) from pose (x, y, th)."""
    c, s = math.cos(th), math.sin(th)
    return x + c * dx - s * dy, y + s * dx + c * dy, th + dth


@physics
def increments_into(twists, dt, out):
    """Exact increments of twists (m, 3) held ``dt`` s each, written to ``out`` (m, 3)."""
    for i in range(twists.shape[0]):
        out[i, 0], out[i, 1], out[i, 2] = exp_increment(twists[i, 0], twists[i, 1], twists[i, 2], dt)


@physics
def integrate_into(pose0, inc, out):
    """Poses after each of the body increments ``inc`` (m, 3) from ``pose0`` (3,), into ``out`` (m, 3)."""
    x, y, th = pose0[0], pose0[1], pose0[2]
    for i in range(inc.shape[0]):
        x, y, th = compose(x, y, th, inc[i, 0], inc[i, 1], inc[i, 2])
        out[i, 0], out[i, 1], out[i, 2] = x, y, th


def body_increment(twist, dt):
    """Displacement over ``dt`` s of constant body twist(s), shape (..., 3) -> (..., 3)."""
    t = np.asarray(twist, dtype=float)
    flat = np.ascontiguousarray(t.reshape(-1, 3))
    out = np.empty_like(flat)
    increments_into(flat, float(dt), out)
    return out.reshape(t.shape)


def step_pose(pose, twist, dt):
    """Pose (3,) after holding body ``twist`` (3,) for ``dt`` s (exact)."""
    dx, dy, dth = exp_increment(float(twist[0]), float(twist[1]), float(twist[2]), float(dt))
    return np.array(compose(float(pose[0]), float(pose[1]), float(pose[2]), dx, dy, dth))


def integrate(pose0, inc) -> np.ndarray:
    """Poses, shape (m, 3), after each body increment of ``inc`` (m, 3) from ``pose0`` (3,)."""
    inc = np.ascontiguousarray(inc, dtype=float).reshape(-1, 3)
    out = np.empty_like(inc)
    integrate_into(np.asarray(pose0, dtype=float), inc, out)
    return out


def body_twist_for_world(theta: float, world_twist, dt: float) -> np.ndarray:
    """Body twist (3,) that, held for ``dt`` s from heading ``theta`` (rad), moves the body
    origin by exactly ``(vx, vy) dt`` in the world frame while turning by ``omega dt``.

    ``world_twist`` is ``(vx, vy, omega)`` with the velocity in the world frame (m/s,
    rad/s).  :func:`log_twist` of that displacement.
    """
    vx, vy, w = (float(v) for v in world_twist)
    c, s = math.cos(theta), math.sin(theta)
    dt = float(dt)
    # the world displacement over dt in the start body frame, and the turn
    return np.array(log_twist((c * vx + s * vy) * dt, (-s * vx + c * vy) * dt, w * dt, dt))
