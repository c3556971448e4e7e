"""Forward and inverse kinematics of a base at a steering configuration.

Forward: body twist from wheel spins, as the least-squares solution of the
stacked rolling rows (driven wheels) and no-sliding rows (fixed and steered
wheels), with the slip residual of every row.  Inverse: wheel spins and steer
angles for a body twist.  Twists are ``(vx, vy, omega)`` body frame (m/s,
m/s, rad/s); spins rad/s; angles rad.

Twist space is given a metric by the base's size ``L`` (m): a twist is
measured as ``(vx, vy, L omega)``.  Least squares with a rank-deficient stack
returns the minimum-norm twist in that metric, and "the nearest admissible
twist" is nearest in it too.
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from sim.theory.constraints import contact_velocity, motion_rows, rolling_rows
from sim.model.robot import Robot

RANK_TOL = 1e-9
SLIP_FLOOR = 1e-12  # m/s: residuals below this are rounding and are reported as exactly 0
STILL = 1e-6  # m/s: a steered wheel's contact point slower than this holds its angle


def twist_scale(robot: Robot) -> np.ndarray:
    return np.array([1.0, 1.0, 1.0 / robot.size])


@dataclass(frozen=True)
class Forward:
    """Result of :func:`forward`.

    twist : ndarray (3,)
    residual : ndarray (m,) m/s, row residual ``A xi - b`` (rows as in ``motion_rows``)
    wheel, rolling : row bookkeeping, see :func:`sim.constraints.motion_rows`
    rank : int, rank of the stack (3 means the motion is fully determined)
    """

    twist: np.ndarray
    residual: np.ndarray
    wheel: np.ndarray
    rolling: np.ndarray
    rank: int

    @property
    def slip(self) -> float:
        return float(np.sqrt(np.sum(self.residual ** 2)))


def forward(robot: Robot, heading, spin) -> Forward:
    """Body twist from wheel headings (n,) rad and spins (n,) rad/s (undriven ignored)."""
    a = robot.arrays
    A, wheel, rolling = motion_rows(robot, heading)
    spin = np.asarray(spin, dtype=float)
    b = np.where(rolling, a.radius[wheel] * np.cos(a.roller[wheel]) * spin[wheel], 0.0)
    if len(A) == 0:
        return Forward(np.zeros(3), np.zeros(0), wheel, rolling, 0)
    S = twist_scale(robot)
    sol, _, rank, _ = np.linalg.lstsq(A * S, b, rcond=RANK_TOL)
    xi = sol * S
    return Forward(xi, snap(A @ xi - b), wheel, rolling, int(rank))


def snap(residual):
    """Residuals (any shape, m/s) with rounding noise below ``SLIP_FLOOR`` set to 0."""
    return np.where(np.abs(residual) < SLIP_FLOOR, 0.0, residual)


def forward_matrix(robot: Robot, heading) -> tuple:
    """Least-squares map from driven spins to twist: (F shape (3, n_driven), driven indices)."""
    a = robot.arrays
    A, wheel, rolling = motion_rows(robot, heading)
    S = twist_scale(robot)
    P = (np.linalg.pinv(A * S, rcond=RANK_TOL) * S[:, None]) if len(A) else np.zeros((3, 0))
    idx = wheel[rolling]
    return P[:, : len(idx)] * (a.radius[idx] * np.cos(a.roller[idx]))[None, :], idx


@lru_cache(maxsize=32)
def admissible_basis(robot: Robot) -> np.ndarray:
    """Orthonormal basis (scaled metric), shape (3, k), of twists the fixed wheels allow (read-only)."""
    a = robot.arrays
    fx = a.is_("fixed")
    from sim.theory.constraints import sliding_rows
    C = sliding_rows(a.x[fx], a.y[fx], a.heading[fx]).reshape(-1, 3) * twist_scale(robot)
    if len(C) == 0:
        basis = np.eye(3)
        basis.flags.writeable = False
        return basis
    _, s, vt = np.linalg.svd(C)
    rank = int(np.sum(s > RANK_TOL * max(1.0, s[0])))
    basis = np.ascontiguousarray(vt[rank:].T)
    basis.flags.writeable = False
    return basis


@dataclass(frozen=True)
class Inverse:
    """Result of :func:`inverse`.

    twist : ndarray (3,), the twist the wheels are set for (after projection and scaling)
    spin : ndarray (n,), rad/s per wheel (0 for undriven)
    steer : ndarray (n,), rad, target heading per wheel (current heading for non-steered)
    shortfall : ndarray (3,), requested minus admissible twist (before speed scaling)
    scale : float, speed scale in (0, 1] applied to respect max_spin
    """

    twist: np.ndarray
    spin: np.ndarray
    steer: np.ndarray
    shortfall: np.ndarray
    scale: float


_DK = np.array([0.0, -1.0, 1.0]).reshape(3, 1)


def choose_angle(target, spin_sign, current, lo, hi):
    """Pick ``target + k pi`` nearest ``current`` within [lo, hi]; arrays (n,).

    Returns (angle, sign) where sign multiplies the spin (-1 for odd k).  When
    no candidate lies within the limits, the candidate nearest to the limits
    is returned (the actuator will clamp it and the wheel will slip).
    """
    target = np.asarray(target, dtype=float)
    current = np.asarray(current, dtype=float)
    k = np.round((current - target) / np.pi) + _DK  # candidates k0, k0 - 1, k0 + 1, shape (3, ...)
    cand = target + k * np.pi
    outside = np.maximum(lo - cand, 0.0) + np.maximum(cand - hi, 0.0)
    cost = np.abs(cand - current) + 1e6 * outside
    # the first candidate in that order unless a later one is cheaper by more than 1e-12
    pick = np.where(cost[1] < cost[0] - 1e-12, 1, 0)
    cols = np.arange(pick.size).reshape(pick.shape)
    pick = np.where(cost[2] < cost[pick, cols] - 1e-12, 2, pick)
    sign = np.where(np.mod(k[pick, cols], 2.0) == 0.0, 1.0, -1.0)
    return cand[pick, cols], sign * spin_sign


def inverse(robot: Robot, twist, heading) -> Inverse:
    """Wheel commands for body ``twist`` (3,) given current headings (n,) rad."""
    a = robot.arrays
    want = np.asarray(twist, dtype=float)
    S = twist_scale(robot)
    N = admissible_basis(robot)
    xi = (N @ (N.T @ (want * (1 / S)))) * S
    shortfall = want - xi
    heading = np.asarray(heading, dtype=float)
    steer = heading.copy()
    st = np.flatnonzero(a.is_("steered"))
    v = contact_velocity(a.x, a.y, xi)
    speed = np.hypot(v[:, 0], v[:, 1])
    if len(st):
        moving = st[speed[st] > STILL]
        if len(moving):
            tgt = np.arctan2(v[moving, 1], v[moving, 0])
            ang, _ = choose_angle(tgt, 1.0, heading[moving], a.steer_lo[moving], a.steer_hi[moving])
            steer[moving] = ang
    d = rolling_rows(a.x, a.y, steer, a.roller)
    spin = (d[:, 0] * xi[0] + d[:, 1] * xi[1] + d[:, 2] * xi[2]) / (a.radius * np.cos(a.roller))
    spin = np.where(a.driven, spin, 0.0)
    over = np.abs(spin) / a.max_spin
    scale = 1.0
    if np.any(over > 1.0):
        scale = float(1.0 / np.max(over))
        spin = spin * scale
        xi = xi * scale
    return Inverse(xi, spin, steer, shortfall, scale)


def inverse_matrix(robot: Robot, heading) -> tuple:
    """Map twist -> driven spins at fixed headings: (shape (n_driven, 3), driven indices)."""
    a = robot.arrays
    idx = np.flatnonzero(a.driven)
    rows = rolling_rows(a.x[idx], a.y[idx], np.asarray(heading, float)[idx], a.roller[idx]).reshape(-1, 3)
    return rows / (a.radius[idx] * np.cos(a.roller[idx]))[:, None], idx
