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

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from sim.jit import physics
from sim.model.robot import (BALL, FIXED, P_CODE, P_DRIVEN, P_HEADING, P_MAX_SPIN, P_RADIUS, P_RCOS,
                             P_ROLLER, P_STEER_HI, P_STEER_LO, P_X, P_Y, STEERED, Robot)
from sim.theory.constraints import motion_rows, motion_rows_into, point_velocity, rolling_row, sliding_row
from sim.theory.linalg import RANK_TOL, jacobi_columns, null_basis_into, pinv_into

SLIP_FLOOR = 1e-12  # m/s: residuals below this are rounding and are reported as exactly 0
STILL = 1e-6  # m/s: a steered wheel's contact point slower than this holds its angle

# how a twist request was turned into wheel commands (the engine records it per row)
FIT_EXACT, FIT_PROJECTED, FIT_SKID = 0, 1, 2
# the fields of the info array filled by inverse_into
I_VX, I_VY, I_W, I_SHORT_VX, I_SHORT_VY, I_SHORT_W, I_SCALE, I_FIT = range(8)
NINFO = 8


def twist_scale(robot: Robot) -> np.ndarray:
    """The metric of twist space, (1, 1, 1 / L) with L = ``robot.size`` (m)."""
    return np.array([1.0, 1.0, 1.0 / robot.size])


# -- forward kinematics ----------------------------------------------------------------------
@physics
def solve_motion(P, A, Pm, m, wheel, rolling, spin, xi, residual):
    """Body twist ``xi`` (3,) from the driven wheels' ``spin`` (n,) rad/s through the map ``Pm``
    (3, m) of the rows ``A`` (:func:`motion_rows_into`, :func:`sim.theory.linalg.pinv_into`);
    row residuals ``A xi - b`` (m/s, rounding below SLIP_FLOOR set to 0) into ``residual``.
    Returns the slip, the root sum of squares of the residuals (m/s)."""
    x0, x1, x2 = 0.0, 0.0, 0.0
    for j in range(m):
        if rolling[j]:
            i = wheel[j]
            b = P[P_RCOS, i] * spin[i]
            x0 += Pm[0, j] * b
            x1 += Pm[1, j] * b
            x2 += Pm[2, j] * b
    xi[0], xi[1], xi[2] = x0, x1, x2
    ss = 0.0
    for j in range(m):
        r = A[j, 0] * x0 + A[j, 1] * x1 + A[j, 2] * x2
        if rolling[j]:
            i = wheel[j]
            r -= P[P_RCOS, i] * spin[i]
        if abs(r) < SLIP_FLOOR:
            r = 0.0
        residual[j] = r
        ss += r * r
    return math.sqrt(ss)


@physics
def passive_spins_into(P, heading, xi, spin):
    """Spins (rad/s) of undriven wheels under body twist ``xi``: standard, Swedish and castor
    wheels roll freely; a ball turns at its contact speed over its radius.  Driven wheels untouched."""
    for i in range(P.shape[1]):
        if P[P_DRIVEN, i] != 0.0:
            continue
        x, y, r = P[P_X, i], P[P_Y, i], P[P_RADIUS, i]
        if P[P_CODE, i] == BALL:
            vx, vy = point_velocity(x, y, xi[0], xi[1], xi[2])
            spin[i] = math.hypot(vx, vy) / r
        else:
            a0, a1, a2 = rolling_row(x, y, heading[i], P[P_ROLLER, i])
            spin[i] = (a0 * xi[0] + a1 * xi[1] + a2 * xi[2]) / P[P_RCOS, i]


# -- inverse kinematics ------------------------------------------------------------------------
@physics
def choose_angle(target, current, lo, hi):
    """Of ``target + k pi`` (k = k0, k0 - 1, k0 + 1, k0 the nearest to ``current``), the one
    nearest ``current`` within [lo, hi] (rad); outside the limits, the one nearest to them
    (the actuator will clamp it and the wheel will slip).  Returns (angle, sign), sign -1 for
    odd k (the spin must be reversed)."""
    k0 = np.rint((current - target) / math.pi)
    best_k, best_cost = k0, 0.0
    for j in range(3):
        k = k0 if j == 0 else (k0 - 1.0 if j == 1 else k0 + 1.0)
        cand = target + k * math.pi
        cost = abs(cand - current) + 1e6 * (max(lo - cand, 0.0) + max(cand - hi, 0.0))
        if j == 0:
            best_k, best_cost = k, cost
        elif cost < best_cost - 1e-12:
            best_k, best_cost = k, cost
    sign = 1.0 if best_k % 2.0 == 0.0 else -1.0
    return target + best_k * math.pi, sign


@physics
def admissible_into(P, scale, N):
    """Orthonormal basis (scaled metric) of the twists the fixed wheels allow, ``N[:, :k]``; returns k."""
    n = P.shape[1]
    C = np.empty((max(n, 1), 3))
    m = 0
    for i in range(n):
        if P[P_CODE, i] == FIXED:
            C[m, 0], C[m, 1], C[m, 2] = sliding_row(P[P_X, i], P[P_Y, i], P[P_HEADING, i], 0.0)
            m += 1
    return null_basis_into(C, m, scale, N)


@physics
def skid_spins_into(P, heading, want, spin):
    """Driven spins whose least-squares body motion (the forward kinematics) is ``want`` (3,),
    for a base whose wheels cannot follow it without sliding (skid steering).

    With rows A (:func:`motion_rows_into`) of full rank, the least-squares motion of spins
    phi is ``(A^T A)^-1 J^T D phi`` (J the rolling rows, D = r cos(roller)); the minimum-norm
    phi with ``J^T D phi = A^T A want`` is taken.  Returns False (spin untouched) when the
    rows are rank deficient or no spins give ``want``.
    """
    n = P.shape[1]
    A = np.empty((2 * n, 3))
    wheel = np.empty(2 * n, np.int64)
    rolling = np.empty(2 * n, np.bool_)
    m = motion_rows_into(P, heading, A, wheel, rolling)
    g0, g1, g2 = 0.0, 0.0, 0.0
    for j in range(m):
        d = A[j, 0] * want[0] + A[j, 1] * want[1] + A[j, 2] * want[2]
        g0 += A[j, 0] * d
        g1 += A[j, 1] * d
        g2 += A[j, 2] * d
    W = np.empty((max(m, 1), 3))
    V = np.empty((3, 3))
    sig = np.empty(3)
    for r in range(m):
        for k in range(3):
            W[r, k] = A[r, k]
    jacobi_columns(W, m, V, sig)
    top = max(sig[0], max(sig[1], sig[2]))
    if not top > 0.0 or min(sig[0], min(sig[1], sig[2])) <= RANK_TOL * top:
        return False
    nd = 0
    for j in range(m):
        if rolling[j]:
            nd += 1
    # B = D J (nd, 3): phi = pinv(B^T) g
    B = np.empty((max(nd, 1), 3))
    for j in range(nd):
        i = wheel[j]
        d = P[P_RCOS, i]
        for k in range(3):
            B[j, k] = d * A[j, k]
    jacobi_columns(B, nd, V, sig)
    top = max(sig[0], max(sig[1], sig[2]))
    phi = np.zeros(max(nd, 1))
    for k in range(3):
        if top > 0.0 and sig[k] > RANK_TOL * top:
            c = (V[0, k] * g0 + V[1, k] * g1 + V[2, k] * g2) / (sig[k] * sig[k])
            for j in range(nd):
                phi[j] += B[j, k] * c
    # check B^T phi = g (B now holds U S, so B^T phi in the rotated frame: recompute from A)
    h0, h1, h2 = 0.0, 0.0, 0.0
    for j in range(nd):
        i = wheel[j]
        d = P[P_RCOS, i]
        h0 += A[j, 0] * d * phi[j]
        h1 += A[j, 1] * d * phi[j]
        h2 += A[j, 2] * d * phi[j]
    err = math.sqrt((h0 - g0) ** 2 + (h1 - g1) ** 2 + (h2 - g2) ** 2)
    if not err <= 1e-9 * max(1.0, math.sqrt(g0 * g0 + g1 * g1 + g2 * g2)):
        return False
    for j in range(nd):
        spin[wheel[j]] = phi[j]
    return True


@physics
def inverse_into(P, scale, N, k, want, heading, skid, steer, spin, info):
    """Wheel commands for body twist ``want`` (3,) at current wheel ``heading`` (n,).

    The twist is projected onto ``N[:, :k]`` (:func:`admissible_into`, what the fixed wheels
    allow, nearest in the metric ``scale``); steered wheels turn to their contact velocity's
    direction (the nearer of an angle and its opposite, within limits; a wheel whose contact
    is still keeps its angle); driven spins follow from the rolling rows; if one exceeds its
    ``max_spin`` all spins and the twist are scaled down together.  With ``skid`` true and a
    base without steered wheels, a twist the wheels cannot follow without sliding is not
    projected: the spins whose least-squares motion is the request are used instead
    (:func:`skid_spins_into`, skid steering).

    Writes ``steer`` (n,) rad, ``spin`` (n,) rad/s (0 for undriven) and ``info`` (NINFO,):
    twist set (3), shortfall = requested minus followed (3, before scaling), scale in (0, 1],
    fit (FIT_EXACT, FIT_PROJECTED or FIT_SKID).
    """
    n = P.shape[1]
    y0, y1, y2 = want[0] / scale[0], want[1] / scale[1], want[2] / scale[2]
    x0, x1, x2 = 0.0, 0.0, 0.0
    for c in range(k):
        d = N[0, c] * y0 + N[1, c] * y1 + N[2, c] * y2
        x0 += N[0, c] * d
        x1 += N[1, c] * d
        x2 += N[2, c] * d
    x0, x1, x2 = x0 * scale[0], x1 * scale[1], x2 * scale[2]
    s0, s1, s2 = want[0] - x0, want[1] - x1, want[2] - x2
    short = math.sqrt(s0 * s0 + s1 * s1 + (s2 / scale[2]) ** 2)
    fit = FIT_EXACT if short <= 1e-12 * max(1.0, math.sqrt(y0 * y0 + y1 * y1 + y2 * y2)) else FIT_PROJECTED
    has_steered = False
    for i in range(n):
        steer[i] = heading[i]
        spin[i] = 0.0
        if P[P_CODE, i] == STEERED:
            has_steered = True
    if fit == FIT_PROJECTED and skid and not has_steered:
        if skid_spins_into(P, heading, want, spin):
            fit = FIT_SKID
            x0, x1, x2 = want[0], want[1], want[2]
            s0, s1, s2 = 0.0, 0.0, 0.0
    if fit != FIT_SKID:
        if fit == FIT_EXACT:
            s0, s1, s2 = 0.0, 0.0, 0.0
        for i in range(n):
            x, y = P[P_X, i], P[P_Y, i]
            if P[P_CODE, i] == STEERED:
                vx, vy = point_velocity(x, y, x0, x1, x2)
                if math.hypot(vx, vy) > STILL:
                    steer[i], _ = choose_angle(math.atan2(vy, vx), heading[i], P[P_STEER_LO, i], P[P_STEER_HI, i])
            if P[P_DRIVEN, i] != 0.0:
                a0, a1, a2 = rolling_row(x, y, steer[i], P[P_ROLLER, i])
                spin[i] = (a0 * x0 + a1 * x1 + a2 * x2) / P[P_RCOS, i]
    worst = 0.0
    for i in range(n):
        if P[P_DRIVEN, i] != 0.0:
            worst = max(worst, abs(spin[i]) / P[P_MAX_SPIN, i])
    sc = 1.0
    if worst > 1.0:
        sc = 1.0 / worst
        for i in range(n):
            spin[i] = spin[i] * sc
        x0, x1, x2 = x0 * sc, x1 * sc, x2 * sc
    info[I_VX], info[I_VY], info[I_W] = x0, x1, x2
    info[I_SHORT_VX], info[I_SHORT_VY], info[I_SHORT_W] = s0, s1, s2
    info[I_SCALE] = sc
    info[I_FIT] = fit


# -- the numpy API (analysis, reports, tests) --------------------------------------------------
@dataclass(frozen=True)
class Forward:
    """Result of :func:`forward`.

    twist : ndarray (3,)
    residual : ndarray (m,) m/s, row residual ``A xi - b`` (rows as in ``motion_rows``)
    wheel, rolling : row bookkeeping, see :func:`sim.theory.constraints.motion_rows`
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
    A, wheel, rolling = motion_rows(robot, heading)
    m = len(A)
    Pm = np.empty((3, max(m, 1)))
    rank = pinv_into(A, m, twist_scale(robot), np.empty((m + 4, 3)), Pm)
    xi, res = np.zeros(3), np.zeros(max(m, 1))
    solve_motion(robot.packed, A, Pm, m, wheel, rolling, np.ascontiguousarray(spin, dtype=float), xi, res)
    return Forward(xi, res[:m].copy(), wheel, rolling, int(rank))


def snap(residual):
    """Residuals (any shape, m/s) with rounding noise below ``SLIP_FLOOR`` set to 0."""
    return np.where(np.abs(residual) < SLIP_FLOOR, 0.0, residual)


def forward_matrix(robot: Robot, heading) -> tuple:
    """Least-squares map from driven spins to twist: (F shape (3, n_driven), driven indices)."""
    a = robot.arrays
    A, wheel, rolling = motion_rows(robot, heading)
    m = len(A)
    Pm = np.empty((3, max(m, 1)))
    pinv_into(A, m, twist_scale(robot), np.empty((m + 4, 3)), Pm)
    idx = wheel[rolling]
    return Pm[:, : len(idx)] * (a.radius[idx] * np.cos(a.roller[idx]))[None, :], idx


COND_WARN = 10.0   # a forward map worse conditioned than this leaves a motion nearly uncontrolled


@dataclass(frozen=True)
class Conditioning:
    """How well the driven wheels determine the body motion (:func:`forward_conditioning`).

    number : condition number of the forward map (largest over smallest singular
    value, twists measured as ``(vx, vy, L omega)``); ``inf`` when a motion is
    left uncontrolled (rank < 3).
    singular : (3,) singular values, largest first (0 for missing ones), in
    (m/s) per (rad/s) of spin.
    weak : (3,) the weak motion ``(vx, vy, omega)`` (m/s, m/s, rad/s), a unit
    twist in that metric: the motion the wheels determine least.  With rank 3
    it is the direction of the largest singular value (the forward map
    amplifies spin errors most along it: the wheels hardly turn when the base
    moves that way); with rank < 3 the direction of a zero singular value (no
    spin produces or resists it).  Sign chosen so its largest part is positive.
    """

    number: float
    singular: np.ndarray
    weak: np.ndarray


def forward_conditioning(robot: Robot, heading=None) -> Conditioning:
    """Singular value decomposition (numpy) of the forward map at ``heading`` (n,) rad
    (default: the file's headings); see :class:`Conditioning`."""
    h = robot.arrays.heading if heading is None else np.asarray(heading, dtype=float)
    F, _ = forward_matrix(robot, h)
    S = twist_scale(robot)
    U, s, _ = np.linalg.svd(F / S[:, None] if F.size else np.zeros((3, 1)))
    sv = np.zeros(3)
    sv[: min(3, len(s))] = s[:3]
    smallest = sv[2]
    full = smallest > RANK_TOL * max(sv[0], 1e-300)
    number = float(sv[0] / smallest) if full else float("inf")
    u = U[:, 0] if full else U[:, 2]
    u = np.where(np.abs(u) < 1e-12, 0.0, u)
    if u[int(np.argmax(np.abs(u)))] < 0:
        u = -u
    return Conditioning(number, sv, u * S + 0.0)


@lru_cache(maxsize=32)
def admissible_basis(robot: Robot) -> np.ndarray:
    """Orthonormal basis (scaled metric), shape (3, k), of twists the fixed wheels allow (read-only)."""
    N = np.empty((3, 3))
    k = admissible_into(robot.packed, twist_scale(robot), N)
    basis = np.ascontiguousarray(N[:, :k])
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
    fit : int, FIT_EXACT, FIT_PROJECTED (onto what the fixed wheels allow) or FIT_SKID
    """

    twist: np.ndarray
    spin: np.ndarray
    steer: np.ndarray
    shortfall: np.ndarray
    scale: float
    fit: int = FIT_EXACT


def inverse(robot: Robot, twist, heading, skid: bool = True) -> Inverse:
    """Wheel commands for body ``twist`` (3,) given current headings (n,) rad (see :func:`inverse_into`)."""
    n = len(robot.wheels)
    N = np.zeros((3, 3))
    k = admissible_into(robot.packed, twist_scale(robot), N)
    steer, spin, info = np.empty(n), np.empty(n), np.empty(NINFO)
    inverse_into(robot.packed, twist_scale(robot), N, k, np.asarray(twist, dtype=float).reshape(3),
                 np.ascontiguousarray(heading, dtype=float), skid, steer, spin, info)
    return Inverse(info[I_VX:I_W + 1].copy(), spin, steer, info[I_SHORT_VX:I_SHORT_W + 1].copy(),
                   float(info[I_SCALE]), int(info[I_FIT]))


def choose_angles(target, current, lo, hi):
    """:func:`choose_angle` over arrays of shape (k,): (angles, signs)."""
    t, c, lo, hi = np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in (target, current, lo, hi)))
    out = [choose_angle(float(a), float(b), float(p), float(q)) for a, b, p, q in
           zip(t.ravel(), c.ravel(), lo.ravel(), hi.ravel())]
    ang = np.array([o[0] for o in out]).reshape(t.shape)
    sign = np.array([o[1] for o in out]).reshape(t.shape)
    return ang, sign


def inverse_matrix(robot: Robot, heading) -> tuple:
    """Map twist -> driven spins at fixed headings: (shape (n_driven, 3), driven indices)."""
    from sim.theory.constraints import rolling_rows
    a = robot.arrays
    idx = np.flatnonzero(a.driven)
    rows = rolling_rows(a.x[idx], a.y[idx], np.asarray(heading, float)[idx], a.roller[idx]).reshape(-1, 3)
    return rows / (a.radius[idx] * np.cos(a.roller[idx]))[:, None], idx
