"""The small solves: least squares over a few rows in three unknowns, written out.

Every least-squares problem of Trundle has three unknowns (a body twist) and a
few rows (two per wheel at most).  It is solved by one-sided Jacobi SVD
(Hestenes 1958; Golub & Van Loan, *Matrix Computations*, 4th ed., sec. 8.6.3): plane
rotations make the three columns of ``A`` orthogonal, so ``A V = U S`` with the
rotations accumulated in ``V``.  It is accurate for small singular values
(unlike the normal equations, which square the condition number), so rank
decisions match LAPACK's, and it is explicit sums in a fixed order: the bytes
do not depend on the machine's math library.
"""
from __future__ import annotations

import math

import numpy as np

from sim.jit import physics

RANK_TOL = 1e-9  # singular values below RANK_TOL x the largest count as zero


@physics
def jacobi_columns(W, m, V, sig):
    """One-sided Jacobi SVD of ``W[:m, :3]`` in place.

    On return the columns of ``W[:m]`` are ``U S`` (mutually orthogonal), ``V``
    (3, 3) is orthogonal with ``A V = W``, and ``sig`` (3,) holds the column norms
    (the singular values, unsorted).
    """
    for i in range(3):
        for j in range(3):
            V[i, j] = 1.0 if i == j else 0.0
    for sweep in range(40):
        rotated = False
        for p in range(2):
            for q in range(p + 1, 3):
                alpha, beta, gamma = 0.0, 0.0, 0.0
                for r in range(m):
                    alpha += W[r, p] * W[r, p]
                    beta += W[r, q] * W[r, q]
                    gamma += W[r, p] * W[r, q]
                if gamma == 0.0 or abs(gamma) <= 1e-15 * math.sqrt(alpha * beta):
                    continue
                rotated = True
                zeta = (beta - alpha) / (2.0 * gamma)
                t = (1.0 if zeta >= 0.0 else -1.0) / (abs(zeta) + math.sqrt(1.0 + zeta * zeta))
                c = 1.0 / math.sqrt(1.0 + t * t)
                s = c * t
                for r in range(m):
                    wp, wq = W[r, p], W[r, q]
                    W[r, p] = c * wp - s * wq
                    W[r, q] = s * wp + c * wq
                for r in range(3):
                    vp, vq = V[r, p], V[r, q]
                    V[r, p] = c * vp - s * vq
                    V[r, q] = s * vp + c * vq
        if not rotated:
            break
    for k in range(3):
        acc = 0.0
        for r in range(m):
            acc += W[r, k] * W[r, k]
        sig[k] = math.sqrt(acc)


@physics
def pinv_into(A, m, scale, W, P):
    """Minimum-norm least-squares map of ``A[:m, :3]`` in the metric ``scale`` (3,).

    ``x = P[:, :m] @ b`` minimises ``|A x - b|`` and, among minimisers, ``|x / scale|``;
    singular values below ``RANK_TOL`` x the largest are dropped.  ``W`` is workspace
    of at least (m + 4, 3) (rows m.. hold V and the singular values: no allocation, as
    the engine calls this whenever a steered wheel turns).  Returns the rank (0..3).
    """
    if W.shape[0] < m + 4:
        raise ValueError("pinv_into: the workspace W needs m + 4 rows")
    V = W[m:m + 3]
    sig = W[m + 3]
    for r in range(m):
        for k in range(3):
            W[r, k] = A[r, k] * scale[k]
    jacobi_columns(W, m, V, sig)
    top = max(sig[0], max(sig[1], sig[2]))
    rank = 0
    for i in range(3):
        for j in range(m):
            P[i, j] = 0.0
    for k in range(3):
        if top > 0.0 and sig[k] > RANK_TOL * top:
            rank += 1
            inv = 1.0 / (sig[k] * sig[k])
            for i in range(3):
                f = scale[i] * V[i, k] * inv
                for j in range(m):
                    P[i, j] += f * W[j, k]
    return rank


@physics
def null_basis_into(A, m, scale, N):
    """Orthonormal basis, in the metric ``scale``, of the twists ``x`` with ``A[:m] x = 0``:
    columns ``N[:, :k]`` (3, k) of unit ``x / scale``; singular values up to
    ``RANK_TOL`` x max(1, largest) count as zero.  Returns k."""
    W = np.empty((max(m, 1), 3))
    V = np.empty((3, 3))
    sig = np.empty(3)
    for r in range(m):
        for k in range(3):
            W[r, k] = A[r, k] * scale[k]
    if m == 0:
        for k in range(3):
            sig[k] = 0.0
            for i in range(3):
                V[i, k] = 1.0 if i == k else 0.0
    else:
        jacobi_columns(W, m, V, sig)
    top = max(1.0, max(sig[0], max(sig[1], sig[2])))
    k = 0
    for c in range(3):
        if not sig[c] > RANK_TOL * top:
            for i in range(3):
                N[i, k] = V[i, c]
            k += 1
    return k


@physics
def lstsq_many_into(A, b, scale, out):
    """Minimum-norm least squares (as :func:`pinv_into`) of each of m systems: rows
    ``A`` (m, r, 3), right-hand sides ``b`` (m, r); solutions into ``out`` (m, 3)."""
    r = A.shape[1]
    W = np.empty((r + 4, 3))
    Pm = np.empty((3, max(r, 1)))
    for i in range(A.shape[0]):
        pinv_into(A[i], r, scale, W, Pm)
        for k in range(3):
            acc = 0.0
            for j in range(r):
                acc += Pm[k, j] * b[i, j]
            out[i, k] = acc


def lstsq(A, b, scale=None):
    """Minimum-norm least squares of ``A`` (m, 3) x = ``b`` (m,) in the metric ``scale``:
    returns (x (3,), rank)."""
    A = np.ascontiguousarray(A, dtype=float).reshape(-1, 3)
    m = len(A)
    S = np.ones(3) if scale is None else np.asarray(scale, dtype=float)
    P = np.empty((3, max(m, 1)))
    rank = pinv_into(A, m, S, np.empty((m + 4, 3)), P)
    return P[:, :m] @ np.asarray(b, dtype=float), rank


def pinv(A, scale=None):
    """The map (3, m) of :func:`lstsq` and the rank."""
    A = np.ascontiguousarray(A, dtype=float).reshape(-1, 3)
    m = len(A)
    S = np.ones(3) if scale is None else np.asarray(scale, dtype=float)
    P = np.empty((3, max(m, 1)))
    rank = pinv_into(A, m, S, np.empty((m + 4, 3)), P)
    return P[:, :m].copy(), rank


def null_basis(A, scale=None) -> np.ndarray:
    """Orthonormal null-space basis (3, k) of ``A`` (m, 3) in the metric ``scale`` (see
    :func:`null_basis_into`); the columns are unit in ``x / scale``."""
    A = np.ascontiguousarray(A, dtype=float).reshape(-1, 3)
    S = np.ones(3) if scale is None else np.asarray(scale, dtype=float)
    N = np.empty((3, 3))
    k = null_basis_into(A, len(A), S, N)
    return N[:, :k].copy()
