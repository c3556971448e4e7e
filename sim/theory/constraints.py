"""The wheel equations: rolling and no-sliding constraint rows, and their stacks.

All rows act on the body twist ``xi = [vx, vy, omega]`` (m/s, m/s, rad/s),
i.e. on ``R(theta) xi_world``.  Written in the x/y/heading form used by the
robot file; each equals the polar alpha/l/beta form of the textbook wheel
equations with ``heading = alpha + beta - 90 deg`` (tests derive this
symbolically).  For a wheel whose contact (or steering axis) is at (x, y) with
heading h and roller angle g:

rolling (driven wheels)
    ``[cos(h+g), sin(h+g), x sin(h+g) - y cos(h+g)] . xi = r phidot cos g``
no sliding (fixed and steered standard wheels)
    ``[-sin h, cos h, x cos h + y sin h] . xi = 0``
no sliding (castor, (x, y) the steering axis, contact ``trail`` behind it)
    ``[-sin h, cos h, x cos h + y sin h - trail] . xi - trail * hdot = 0``

The castor's heading is the textbook castor angle plus 180 deg: here positive
spin rolls the wheel away from its trail, so a castor pulled forward settles
at heading 0 with positive spin.  Swedish and ball wheels give no no-sliding
row (their rollers, or the sphere, absorb it); ball wheels give no row at all.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from sim.jit import physics
from sim.model.robot import FIXED, P_CODE, P_DRIVEN, P_ROLLER, P_X, P_Y, STEERED, Robot


@physics
def rolling_row(x, y, h, g):
    """Rolling row of a wheel at (x, y) m, heading ``h``, roller angle ``g`` (rad): 3 floats."""
    return rolling_row_cs(x, y, math.cos(h + g), math.sin(h + g))


@physics
def rolling_row_cs(x, y, c, s):
    """:func:`rolling_row` given ``c, s`` = cos, sin of heading + roller angle."""
    return c, s, x * s - y * c


@physics
def sliding_row(x, y, h, trail):
    """No-sliding row of a wheel at (x, y) m, heading ``h`` rad; ``trail`` > 0 m for castors: 3 floats."""
    return sliding_row_cs(x, y, math.cos(h), math.sin(h), trail)


@physics
def sliding_row_cs(x, y, c, s, trail):
    """:func:`sliding_row` given ``c, s`` = cos, sin of the heading."""
    return -s, c, x * c + y * s - trail


@physics
def point_velocity(x, y, vx, vy, w):
    """Rigid-body velocity (m/s, body frame) of body point (x, y) m under twist (vx, vy, w)."""
    return vx - w * y, vy + w * x


@physics
def rows_into(sliding, x, y, h, g, out):
    """Rolling (``sliding`` False; ``g`` roller angles) or no-sliding (``g`` trails) rows of
    wheels given as flat arrays (k,), into ``out`` (k, 3)."""
    for i in range(x.shape[0]):
        if sliding:
            out[i, 0], out[i, 1], out[i, 2] = sliding_row(x[i], y[i], h[i], g[i])
        else:
            out[i, 0], out[i, 1], out[i, 2] = rolling_row(x[i], y[i], h[i], g[i])


@physics
def velocities_into(x, y, xi, out):
    """Velocities (k, 2) of body points (k,) under twists ``xi`` (k, 3), into ``out``."""
    for i in range(x.shape[0]):
        out[i, 0], out[i, 1] = point_velocity(x[i], y[i], xi[i, 0], xi[i, 1], xi[i, 2])


def _flat(*arrays):
    b = np.broadcast_arrays(*[np.asarray(a, dtype=float) for a in arrays])
    return b[0].shape, [np.array(a.reshape(-1)) for a in b]


def rolling_rows(x, y, heading, roller):
    """Rolling rows, shape (..., 3), for arrays of shape (...) (m, rad)."""
    shape, (x, y, h, g) = _flat(x, y, heading, roller)
    out = np.empty((x.size, 3))
    rows_into(False, x, y, h, g, out)
    return out.reshape(shape + (3,))


def sliding_rows(x, y, heading, trail=0.0):
    """No-sliding rows, shape (..., 3); ``trail`` > 0 for castors (m)."""
    shape, (x, y, h, d) = _flat(x, y, heading, trail)
    out = np.empty((x.size, 3))
    rows_into(True, x, y, h, d, out)
    return out.reshape(shape + (3,))


def contact_velocity(x, y, xi):
    """Rigid-body velocity, shape (..., 2) m/s, of body points (x, y) for twist ``xi`` (..., 3)."""
    xi = np.asarray(xi, dtype=float)
    shape, (x, y, vx, vy, w) = _flat(x, y, xi[..., 0], xi[..., 1], xi[..., 2])
    out = np.empty((x.size, 2))
    velocities_into(x, y, np.ascontiguousarray(np.stack([vx, vy, w], axis=1)), out)
    return out.reshape(shape + (2,))


def castor_contact(x, y, heading, trail):
    """Contact point (m), shape (..., 2), of castors with steering axis (x, y)."""
    return np.stack([x - trail * np.cos(heading), y - trail * np.sin(heading)], axis=-1)


@dataclass(frozen=True)
class Stack:
    """The stacked matrices of a base at one steering configuration.

    Row blocks follow file order within each block.  Shapes: ``J1f`` (n_f, 3)
    rolling rows of driven wheels of fixed angle (fixed, Swedish); ``J1s``
    (n_s, 3) rolling rows of driven wheels of variable angle (steered,
    castor); ``C1f`` (m_f, 3) no-sliding rows of fixed wheels; ``C1s``
    (m_s, 3) of steered wheels; ``C1c`` (m_c, 3) of castors with ``C2`` (m_c,)
    m, the coefficients of their steering rates, so that
    ``C1c xi + diag(C2) hdot = 0`` (``C2 = -trail``, the sign this equation needs
    with the rows above); ``J2`` (n_f+n_s,) ``r cos(gamma)`` of the driven wheels,
    so that ``J1 xi = diag(J2) phidot``.  ``*_names`` hold the wheel names per block.
    """

    J1f: np.ndarray
    J1s: np.ndarray
    C1f: np.ndarray
    C1s: np.ndarray
    C1c: np.ndarray
    C2: np.ndarray
    J2: np.ndarray
    J1f_names: tuple
    J1s_names: tuple
    C1f_names: tuple
    C1s_names: tuple
    C1c_names: tuple

    @property
    def J1(self) -> np.ndarray:
        return np.vstack([self.J1f, self.J1s])

    @property
    def C1(self) -> np.ndarray:
        """C1* = [C1f; C1s]: the no-sliding rows that restrict the body motion."""
        return np.vstack([self.C1f, self.C1s])

    @property
    def driven_names(self) -> tuple:
        return self.J1f_names + self.J1s_names


def angles_with(robot: Robot, steer: dict | None = None) -> np.ndarray:
    """Wheel headings, shape (n,) rad: the file's, with ``steer`` {name: rad} overriding."""
    h = robot.arrays.heading.copy()
    for name, value in (steer or {}).items():
        h[robot.index[name]] = value
    return h


def stack(robot: Robot, heading=None) -> Stack:
    """Stacked matrices at wheel headings ``heading`` (shape (n,), rad; default: the file's)."""
    a = robot.arrays
    h = a.heading if heading is None else np.asarray(heading, dtype=float)
    roll = rolling_rows(a.x, a.y, h, a.roller)
    slide = sliding_rows(a.x, a.y, h, a.trail)
    names = np.array([w.name for w in robot.wheels], dtype=object)

    def pick(rows, mask):
        return rows[mask].reshape(-1, 3), tuple(names[mask])

    fixed_angle = a.is_("fixed", "swedish") & a.driven
    var_angle = a.is_("steered", "castor") & a.driven
    J1f, nf = pick(roll, fixed_angle)
    J1s, ns = pick(roll, var_angle)
    C1f, cf = pick(slide, a.is_("fixed"))
    C1s, cs = pick(slide, a.is_("steered"))
    C1c, cc = pick(slide, a.is_("castor"))
    r_cos = a.radius * np.cos(a.roller)
    J2 = np.concatenate([r_cos[fixed_angle], r_cos[var_angle]])
    return Stack(J1f, J1s, C1f, C1s, C1c, -a.trail[a.is_("castor")], J2, nf, ns, cf, cs, cc)


@physics
def motion_rows_into(P, heading, A, wheel, rolling):
    """Rows of the body-motion solve at wheel ``heading`` (n,) rad, for wheels ``P`` (NPARAM, n).

    Rolling rows of driven wheels, then no-sliding rows of fixed and steered wheels,
    each block in file order, into ``A`` (>= 2n, 3); ``wheel`` (int) and ``rolling``
    (bool) say whose row each is.  Returns the number of rows m.
    """
    n = P.shape[1]
    m = 0
    for i in range(n):
        if P[P_DRIVEN, i] != 0.0:
            A[m, 0], A[m, 1], A[m, 2] = rolling_row(P[P_X, i], P[P_Y, i], heading[i], P[P_ROLLER, i])
            wheel[m], rolling[m] = i, True
            m += 1
    r = 0                 # the rolling row of wheel i, if it has one
    for i in range(n):
        c = P[P_CODE, i]
        if c == FIXED or c == STEERED:
            h = heading[i]
            if P[P_DRIVEN, i] != 0.0 and P[P_ROLLER, i] == 0.0 and h != 0.0:
                # its rolling row holds cos h, sin h already (h + 0 is h unless h is -0)
                A[m, 0], A[m, 1], A[m, 2] = sliding_row_cs(P[P_X, i], P[P_Y, i], A[r, 0], A[r, 1], 0.0)
            else:
                A[m, 0], A[m, 1], A[m, 2] = sliding_row(P[P_X, i], P[P_Y, i], h, 0.0)
            wheel[m], rolling[m] = i, False
            m += 1
        if P[P_DRIVEN, i] != 0.0:
            r += 1
    return m


def motion_rows(robot: Robot, heading) -> tuple:
    """Rows the engine solves: (A, kind, wheel) for one configuration.

    Returns
    -------
    A : ndarray, shape (m, 3)
        Rolling rows of driven wheels, then no-sliding rows of fixed and
        steered wheels, each block in file order.
    wheel : ndarray, shape (m,) int
        Wheel index of each row.
    rolling : ndarray, shape (m,) bool
        True for rolling rows (right-hand side ``r cos(g) phidot``), False for
        no-sliding rows (right-hand side 0).
    """
    n = len(robot.wheels)
    A = np.empty((2 * n, 3))
    wheel = np.empty(2 * n, np.int64)
    rolling = np.empty(2 * n, np.bool_)
    m = motion_rows_into(robot.packed, np.ascontiguousarray(heading, dtype=float), A, wheel, rolling)
    return A[:m].copy(), wheel[:m].copy(), rolling[:m].copy()
