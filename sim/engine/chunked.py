"""The chunked engine: the fixed-step semantics of :mod:`sim.engine`, computed
across time with numpy.

Between two script entries the commands are constant, so every actuator
follows a path known in advance: a steering ramp at ``max_steer_rate`` that
stops on its goal, spin ramps at ``max_spin_accel`` (all wheels together under
a twist command, each on its own under wheel commands), the alignment policy
switching the drive on once the steering is within tolerance.  A chunk of up
to ``CHUNK`` steps is therefore computed at once:

* actuator paths in closed form (the ``cosine`` policy, whose targets change
  every step while wheels steer, falls back to a loop over those steps only);
* twists as a batch of small least-squares solves, one per distinct steering
  configuration (one for the whole run on a fixed-geometry base), by 3x3
  normal equations where well conditioned; a driven standard wheel's two rows
  add a heading-free term to them, so a base of driven steered wheels keeps
  one normal matrix through every steering ramp;
* castor swivels as prefix products of the per-step linear fractional maps of
  :mod:`sim.castor` (a log-depth scan), so passive castors stay vectorised;
* poses by cumulative sums of the exact SE(2) increments.

Results agree with the step-by-step reference to rounding (the tests compare
both on every demo scenario); output is deterministic.  Bases with driven
castors use the reference engine (:func:`supported`).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from sim.theory.castor import flow_coefficients
from sim.theory.constraints import contact_velocity, motion_rows, rolling_rows
from sim.engine.simulator import ICR_OMEGA_MIN, Simulator, StepResult, step_times
from sim.theory.kinematics import RANK_TOL, twist_scale, inverse, snap
from sim.theory.se2 import body_increment

CHUNK = 32768
_WELL_CONDITIONED = 1e-5  # det(G)/trace(G)^3 above this: normal equations are safe


def supported(robot) -> bool:
    """True when the chunked engine reproduces the reference for this base."""
    a = robot.arrays
    return not np.any(a.is_("castor") & a.driven)


@dataclass
class Block:
    """Rows ``k0 .. k0+m-1`` of a run, columnar.  Per-row fields as in
    :class:`~sim.engine.StepResult`, with a leading axis of length m:
    ``t`` (m,), ``pose``/``twist``/``cmd``/``shortfall`` (m, 3), ``icr`` (m, 2),
    ``slip`` (m,), per-wheel arrays (m, n), ``rank`` (m,)."""

    k0: int
    t: np.ndarray
    pose: np.ndarray
    twist: np.ndarray
    icr: np.ndarray
    slip: np.ndarray
    cmd: np.ndarray
    spin_cmd: np.ndarray
    spin: np.ndarray
    steer_cmd: np.ndarray
    steer: np.ndarray
    slip_long: np.ndarray
    slip_lat: np.ndarray
    angle: np.ndarray
    shortfall: np.ndarray
    rank: np.ndarray
    twist_mode: bool

    def __len__(self) -> int:
        return len(self.t)

    @classmethod
    def from_rows(cls, k0: int, rows) -> "Block":
        """Stack :class:`~sim.engine.StepResult` rows into a block."""
        st = lambda f: np.array([getattr(r, f) for r in rows])
        twist_mode = rows[0].cmd_twist is not None
        cmd = np.array([r.cmd_twist if r.cmd_twist is not None else (np.nan,) * 3 for r in rows], float)
        return cls(k0, st("t"), st("pose"), st("twist"), st("icr"), st("slip"), cmd,
                   st("spin_cmd"), st("spin"), st("steer_cmd"), st("steer"), st("slip_long"),
                   st("slip_lat"), st("angle"), st("shortfall"), st("rank"), twist_mode)

    def row(self, i: int) -> StepResult:
        """Row ``k0 + i`` as a :class:`~sim.engine.StepResult`."""
        return StepResult(
            t=float(self.t[i]), pose=self.pose[i].copy(), twist=self.twist[i].copy(),
            icr=self.icr[i].copy(), slip=float(self.slip[i]),
            cmd_twist=None if np.isnan(self.cmd[i, 0]) else self.cmd[i].copy(),
            spin_cmd=self.spin_cmd[i].copy(), spin=self.spin[i].copy(),
            steer_cmd=self.steer_cmd[i].copy(), steer=self.steer[i].copy(),
            slip_long=self.slip_long[i].copy(), slip_lat=self.slip_lat[i].copy(),
            angle=self.angle[i].copy(), shortfall=self.shortfall[i].copy(), rank=int(self.rank[i]))

    def values(self) -> np.ndarray:
        """Rows in CSV column order (see :mod:`sim.trace`), shape (m, 13 + 6 n)."""
        m, n = self.spin.shape
        wheels = np.stack([self.spin_cmd, self.spin, self.steer_cmd, self.steer,
                           self.slip_long, self.slip_lat], axis=2).reshape(m, 6 * n)
        return np.hstack([self.t[:, None], self.pose, self.twist, self.icr, self.slip[:, None],
                          self.cmd, wheels])


def prefix_products(M: np.ndarray) -> np.ndarray:
    """Inclusive prefix products ``P[i] = M[i] @ ... @ M[0]`` of 2x2 matrices.

    ``M`` has shape (m, c, 2, 2); each product is rescaled to unit largest
    entry (the maps are projective, so scale is irrelevant).  Hillis-Steele
    doubling: ceil(log2 m) vectorised passes.
    """
    P = M.copy()
    m = len(P)
    shift = 1
    while shift < m:
        A, B = P[shift:], P[:-shift]
        a00 = A[..., 0, 0] * B[..., 0, 0] + A[..., 0, 1] * B[..., 1, 0]
        a01 = A[..., 0, 0] * B[..., 0, 1] + A[..., 0, 1] * B[..., 1, 1]
        a10 = A[..., 1, 0] * B[..., 0, 0] + A[..., 1, 1] * B[..., 1, 0]
        a11 = A[..., 1, 0] * B[..., 0, 1] + A[..., 1, 1] * B[..., 1, 1]
        norm = np.maximum(np.maximum(np.abs(a00), np.abs(a01)), np.maximum(np.abs(a10), np.abs(a11)))
        P[shift:, ..., 0, 0] = a00 / norm
        P[shift:, ..., 0, 1] = a01 / norm
        P[shift:, ..., 1, 0] = a10 / norm
        P[shift:, ..., 1, 1] = a11 / norm
        shift *= 2
    return P


def castor_path(h0, x, y, trail, twists, dt) -> np.ndarray:
    """Castor headings at the start of each of m steps and after the last.

    Parameters: ``h0`` (c,) rad; ``x, y, trail`` (c,) m; ``twists`` (m, 3).
    Returns shape (m + 1, c): row 0 is ``h0``, row j the heading after j steps.
    """
    m = len(twists)
    # per-step map on w(h) = (sin h/2, cos h/2): M = Q(delta)^T E Q(delta)
    C, Sa, Sb, delta = flow_coefficients(x[None, :], y[None, :], trail[None, :], twists[:, None, :], dt)
    c, s = np.cos(delta / 2.0), np.sin(delta / 2.0)
    # E Q(delta): E = [[C, Sa], [Sb, C]], Q = [[c, -s], [s, c]]
    e00, e01 = C * c + Sa * s, -C * s + Sa * c
    e10, e11 = Sb * c + C * s, -Sb * s + C * c
    M = np.empty((m,) + h0.shape + (2, 2))
    # Q^T (E Q), Q^T = [[c, s], [-s, c]]
    M[..., 0, 0] = c * e00 + s * e10
    M[..., 0, 1] = c * e01 + s * e11
    M[..., 1, 0] = -s * e00 + c * e10
    M[..., 1, 1] = -s * e01 + c * e11
    P = prefix_products(M)
    p0, q0 = np.sin(h0 / 2.0), np.cos(h0 / 2.0)
    p = P[..., 0, 0] * p0 + P[..., 0, 1] * q0
    q = P[..., 1, 0] * p0 + P[..., 1, 1] * q0
    h = np.vstack([h0[None, :], 2.0 * np.arctan2(p, q)])
    return np.unwrap(h, axis=0)


def _inverse3(G):
    """Inverse of a symmetric 3x3 normal matrix when well conditioned (the test of
    :meth:`ChunkedSimulator._batch_twists`), else None; in Python floats (one small matrix)."""
    (g0, g1, g2), (g3, g4, g5), (g6, g7, g8) = G.tolist()
    c00, c01, c02 = g4 * g8 - g5 * g7, g5 * g6 - g3 * g8, g3 * g7 - g4 * g6
    det = g0 * c00 + g1 * c01 + g2 * c02
    if not det > _WELL_CONDITIONED * (g0 + g4 + g8) ** 3:
        return None
    return np.array([[c00, g2 * g7 - g1 * g8, g1 * g5 - g2 * g4],
                     [c01, g0 * g8 - g2 * g6, g2 * g3 - g0 * g5],
                     [c02, g1 * g6 - g0 * g7, g0 * g4 - g1 * g3]]) / det


def _ramp_rows(distance, rate, m) -> int:
    """Rows (of ``m``) a ramp at ``rate`` per row takes to cover each ``distance`` (arrays of
    a few wheels, same units), plus one for rounding: every later row is the goal."""
    worst = 0.0
    for dist, r in zip(np.ravel(distance).tolist(), np.ravel(rate).tolist()):
        if dist > 0:
            worst = max(worst, dist / r if r > 0 else math.inf)
    return m if not worst < m else min(m, math.ceil(worst) + 1)


class ChunkedSimulator(Simulator):
    """A :class:`~sim.engine.Simulator` that advances many steps per call.

    Commands are set exactly as on the reference simulator; :meth:`advance`
    runs ``m`` steps under the current commands and returns a :class:`Block`.
    """

    def __init__(self, robot, step, start=(0.0, 0.0, 0.0), align="wait", align_tolerance=None):
        kw = {} if align_tolerance is None else {"align_tolerance": align_tolerance}
        super().__init__(robot, step, start, align, **kw)
        if not supported(robot):
            raise ValueError("the chunked engine does not handle driven castors; use Simulator")
        self._solve_cache = {}
        self._gram0, self._lone = self._paired_gram(), self._lone_rows()

    # -- actuator paths --------------------------------------------------
    def _steer_path(self, m):
        """Steered headings after each of m steering moves, shape (m, n)."""
        a, st = self.robot.arrays, self._steered
        H = np.broadcast_to(self.heading, (m, len(self.heading))).copy()
        if np.any(st):
            h0 = self.heading[st]
            goal = np.clip(self.steer_cmd[st], a.steer_lo[st], a.steer_hi[st])
            e0 = goal - h0
            rate = a.max_steer_rate[st] * self.dt
            L = _ramp_rows(np.abs(e0), rate, m)  # rows after these sit on the goal
            j = np.arange(1, L + 1, dtype=float)[:, None]
            travel = np.minimum(j * rate, np.abs(e0))
            H[:L, st] = np.where(travel >= np.abs(e0), goal, h0 + np.sign(e0) * travel)
            H[L:, st] = goal
        return H

    def _ramp(self, x0, target, length, together):
        """Spin paths of driven wheels toward a constant target, shape (length, n_driven)."""
        a, d = self.robot.arrays, self._driven
        dv = a.max_spin_accel[d] * self.dt
        delta = target - x0
        X = np.empty((length, len(x0)))
        if together:
            need = np.abs(delta) / dv
            worst = float(np.max(need)) if need.size else 0.0
            L = 0 if worst <= 1.0 else _ramp_rows(worst, 1.0, length)  # the slowest wheel sets the pace
            j = np.arange(1, L + 1, dtype=float)[:, None]
            X[:L] = np.where(j >= worst, target, x0 + delta * (j / worst))
        else:
            L = _ramp_rows(np.abs(delta), dv, length)
            j = np.arange(1, L + 1, dtype=float)[:, None]
            travel = np.minimum(j * dv, np.abs(delta))
            X[:L] = np.where(travel >= np.abs(delta), target, x0 + np.sign(delta) * travel)
        lim = a.max_spin[d]
        np.clip(X[:L], -lim, lim, out=X[:L])
        X[L:] = np.clip(target, -lim, lim)  # the ramp has arrived
        return X

    def _spin_path(self, targets, together):
        """Driven spins for per-step targets (m, n_driven), piecewise-constant runs in closed form."""
        m = len(targets)
        out = np.empty_like(targets)
        x = self.spin[self._driven].copy()
        if m == 0:
            return out
        change = np.flatnonzero(np.any(targets[1:] != targets[:-1], axis=1)) + 1
        starts = np.concatenate([[0], change])
        ends = np.concatenate([change, [m]])
        for s, e in zip(starts, ends):
            out[s:e] = self._ramp(x, targets[s], e - s, together)
            x = out[e - 1]
        return out

    # -- twist solves ------------------------------------------------------
    def _solver(self, heading):
        """(A, P, rank) for one configuration: twist = P @ b (shapes (r,3), (3,r))."""
        key = heading.tobytes()
        hit = self._solve_cache.get(key)
        if hit is None:
            A, _, _ = motion_rows(self.robot, heading)
            S = twist_scale(self.robot)
            AS = A * S
            Ginv = _inverse3(AS.T @ AS) if len(A) >= 3 else None
            if Ginv is not None:  # well conditioned: normal equations, as in _batch_twists
                P, rank = Ginv @ AS.T * S[:, None], 3
            elif len(A):
                U, sv, Vt = np.linalg.svd(AS, full_matrices=False)
                rank = int(np.sum(sv > RANK_TOL * max(1.0, sv[0])))
                P = (Vt[:rank].T / sv[:rank]) @ U[:, :rank].T * S[:, None]
            else:
                P, rank = np.zeros((3, 0)), 0
            hit = (A, P, rank)
            if len(self._solve_cache) > 64:
                self._solve_cache.clear()
            self._solve_cache[key] = hit
        return hit

    def _paired(self):
        """Mask, shape (n,): driven standard wheels, which give both a rolling and a no-sliding row."""
        a = self.robot.arrays
        return a.driven & a.is_("fixed", "steered") & (a.roller == 0.0)

    def _paired_gram(self):
        """Sum of the scaled normal-equation terms of paired rows, shape (3, 3).

        A wheel's rolling and no-sliding rows are its contact-velocity map
        [[1, 0, -y], [0, 1, x]] turned by its heading, so together they add the
        same term whatever the heading: the steering drops out of it.
        """
        a, S = self.robot.arrays, twist_scale(self.robot)
        p = self._paired()
        M = np.zeros((int(p.sum()), 2, 3))
        M[:, 0, 0] = M[:, 1, 1] = 1.0
        M[:, 0, 2], M[:, 1, 2] = -a.y[p], a.x[p]
        MS = M * S
        return np.einsum("wri,wrj->ij", MS, MS)

    def _lone_rows(self):
        """Indices, in :meth:`_batch_twists`' row order, of the rows of unpaired wheels."""
        a = self.robot.arrays
        p = self._paired()
        idx_r = np.flatnonzero(a.driven)
        idx_s = np.flatnonzero(a.is_("fixed", "steered"))
        return np.flatnonzero(~p[np.concatenate([idx_r, idx_s])])

    def _batch_twists(self, H, B):
        """Least-squares twists for K steps whose headings differ row to row.

        ``H`` (K, n) headings, ``B`` (K, r) right-hand sides.  Returns
        ``(xi (K, 3), residual (K, r), rank (K,))``: normal equations where they
        are well conditioned, the pseudo-inverse (minimum norm) elsewhere.
        """
        a = self.robot.arrays
        S = twist_scale(self.robot)
        idx_r = np.flatnonzero(a.driven)
        idx_s = np.flatnonzero(a.is_("fixed", "steered"))
        hr, hs = H[:, idx_r] + a.roller[idx_r], H[:, idx_s]
        cr, sr, cs, ss = np.cos(hr), np.sin(hr), np.cos(hs), np.sin(hs)
        xr, yr, xs, ys = a.x[idx_r], a.y[idx_r], a.x[idx_s], a.y[idx_s]
        A = np.concatenate([np.stack([cr, sr, xr * sr - yr * cr], axis=2),
                            np.stack([-ss, cs, xs * cs + ys * ss], axis=2)], axis=1)
        AS = A * S
        G = np.broadcast_to(self._gram0, (len(H), 3, 3))
        lone = self._lone
        if len(lone):
            G = G + np.einsum("kri,krj->kij", AS[:, lone], AS[:, lone])
        G = G.reshape(-1, 9)
        rhs = np.einsum("kri,kr->ki", AS, B)
        g0, g1, g2, g3, g4, g5, g6, g7, g8 = G.T
        c00, c01, c02 = g4 * g8 - g5 * g7, g5 * g6 - g3 * g8, g3 * g7 - g4 * g6
        det = g0 * c00 + g1 * c01 + g2 * c02
        tr = g0 + g4 + g8
        good = det > _WELL_CONDITIONED * tr ** 3
        safe = np.where(good, det, 1.0)
        r0, r1, r2 = rhs.T
        sol = np.stack([
            c00 * r0 + (g2 * g7 - g1 * g8) * r1 + (g1 * g5 - g2 * g4) * r2,
            c01 * r0 + (g0 * g8 - g2 * g6) * r1 + (g2 * g3 - g0 * g5) * r2,
            c02 * r0 + (g1 * g6 - g0 * g7) * r1 + (g0 * g4 - g1 * g3) * r2,
        ], axis=1) / safe[:, None]
        rank = np.full(len(H), 3)
        for i in np.flatnonzero(~good):
            sol[i], _, rank[i], _ = np.linalg.lstsq(AS[i], B[i], rcond=RANK_TOL)
        xi = sol * S
        R = np.einsum("kri,ki->kr", A, xi) - B
        return xi, R, rank

    # -- one chunk -----------------------------------------------------------
    def plan(self, m: int) -> dict:
        """Actuator paths for ``m`` steps under the current commands.

        Moves the actuator state (steered headings, driven spins, spin
        commands) to the end of those steps; the body motion is computed by
        :meth:`move` for one or more plans at once.
        """
        robot, a = self.robot, self.robot.arrays
        n = len(robot.wheels)
        st, d = self._steered, self._driven
        twist_mode = self.twist_cmd is not None
        shortfall = np.zeros(3)
        if twist_mode:
            ik = inverse(robot, self.twist_cmd, self.heading)
            self.steer_cmd[st] = ik.steer[st]
            base_target = ik.spin[d]
            shortfall = ik.shortfall
        else:
            base_target = self.spin_cmd[d]
        H = self._steer_path(m)
        targets = np.broadcast_to(base_target, (m, int(d.sum()))).copy()
        if twist_mode and np.any(st):
            # error toward the reachable goal, as sim/engine.py step 3 (clamped to steer_limits)
            err = np.clip(self.steer_cmd[st], a.steer_lo[st], a.steer_hi[st])[None, :] - H[:, st]
            if self.align == "wait":
                waiting = np.any(np.abs(err) > self.align_tolerance, axis=1)
                targets[waiting] = 0.0
            elif self.align == "cosine":
                f = np.ones((m, n))
                f[:, st] = np.maximum(np.cos(err), 0.0)
                targets = targets * f[:, d]
        spin_d = self._spin_path(targets, together=twist_mode)
        self.heading[st] = H[-1, st]
        self.spin[d] = spin_d[-1]
        if twist_mode:
            self.spin_cmd[d] = targets[-1]
        steer_cmd = np.where(self._castor, np.nan, np.where(st, self.steer_cmd, 0.0))
        cmd = self.twist_cmd.copy() if twist_mode else np.full(3, np.nan)
        return {"m": m, "H": H, "spin": spin_d, "targets": targets, "steer_cmd": steer_cmd,
                "cmd": cmd, "shortfall": shortfall, "twist_mode": twist_mode}

    def advance(self, m: int) -> Block:
        """Run ``m`` steps under the current commands; return their rows."""
        return self.move([self.plan(m)])

    def move(self, plans) -> Block:
        """Body motion, passive wheels and rows for consecutive plans."""
        robot, a, dt = self.robot, self.robot.arrays, self.dt
        n = len(robot.wheels)
        st, d, cs = self._steered, self._driven, self._castor
        lens = [p["m"] for p in plans]
        m = int(sum(lens))
        rep = lambda key: np.repeat(np.array([p[key] for p in plans]), lens, axis=0)
        H = np.concatenate([p["H"] for p in plans])
        spin = np.zeros((m, n))
        spin[:, d] = np.concatenate([p["spin"] for p in plans])
        # twists: one solve per distinct steering configuration
        rc = a.radius * np.cos(a.roller)
        idx_r = np.flatnonzero(d)
        n_slide = int(np.sum(a.is_("fixed", "steered")))
        B = np.concatenate([spin[:, idx_r] * rc[idx_r], np.zeros((m, n_slide))], axis=1)
        if np.any(st):
            # runs of constant steering share one solve; steps inside a steering
            # ramp (runs of one) are solved as a batch
            moving = np.ones(m, bool)
            moving[1:] = np.any(H[1:, st] != H[:-1, st], axis=1)
            starts = np.flatnonzero(moving)
            ends = np.append(starts[1:], m)
            xi = np.empty((m, 3))
            R = np.empty_like(B)
            rank = np.empty(m, dtype=int)
            single = starts[ends - starts == 1]
            if len(single):
                xi[single], R[single], rank[single] = self._batch_twists(H[single], B[single])
            for s0, e0 in zip(starts[ends - starts > 1], ends[ends - starts > 1]):
                A1, P1, r1 = self._solver(H[s0])
                xi[s0:e0] = B[s0:e0] @ P1.T
                R[s0:e0] = xi[s0:e0] @ A1.T - B[s0:e0]
                rank[s0:e0] = r1
        else:
            A1, P1, r1 = self._solver(H[0])
            xi = B @ P1.T
            R = xi @ A1.T - B
            rank = np.full(m, r1)
        R = snap(R)
        _, wheel, rolling = motion_rows(robot, self.heading)
        slip_long = np.full((m, n), np.nan)
        slip_lat = np.full((m, n), np.nan)
        slip_long[:, wheel[rolling]] = R[:, rolling]
        slip_lat[:, wheel[~rolling]] = R[:, ~rolling]
        slip = np.sqrt(np.sum(R ** 2, axis=1))
        # passive wheels
        steer = H
        if np.any(cs):
            hc = castor_path(self.heading[cs], a.x[cs], a.y[cs], a.trail[cs], xi, dt)
            steer[:, cs] = hc[:-1]
            self.heading[cs] = hc[-1]
        passive = ~d & ~a.is_("ball")
        if np.any(passive):
            rows = rolling_rows(a.x[passive], a.y[passive], steer[:, passive], a.roller[passive])
            spin[:, passive] = np.einsum("mwi,mi->mw", rows, xi) / rc[passive]
        ball = a.is_("ball")
        if np.any(ball):
            v = contact_velocity(a.x[ball], a.y[ball], xi[:, None, :])
            spin[:, ball] = np.hypot(v[..., 0], v[..., 1]) / a.radius[ball]
        # runs of one twist (a row whose twist differs from the one before starts a run):
        # the increment and the body-frame ICR are worked out once per run
        new = np.ones(m, bool)
        new[1:] = np.any(xi[1:] != xi[:-1], axis=1)
        starts = np.flatnonzero(new)
        run = np.cumsum(new) - 1
        xu = xi[starts]
        # poses: exact increments, cumulative sums
        inc = body_increment(xu, dt)[run]
        theta = np.cumsum(np.concatenate([[self.pose[2]], inc[:, 2]]))
        c, s = np.cos(theta[:-1]), np.sin(theta[:-1])
        x = np.cumsum(np.concatenate([[self.pose[0]], c * inc[:, 0] - s * inc[:, 1]]))
        y = np.cumsum(np.concatenate([[self.pose[1]], s * inc[:, 0] + c * inc[:, 1]]))
        pose = np.stack([x[:-1], y[:-1], theta[:-1]], axis=1)
        # ICR in the world: fixed while the twist is, placed from the first row of each run
        w = xu[:, 2]
        turning = np.abs(w) > ICR_OMEGA_MIN
        ws = np.where(turning, w, 1.0)
        px, py = -xu[:, 1] / ws, xu[:, 0] / ws
        c0, s0, p0 = c[starts], s[starts], pose[starts]
        icr = np.stack([np.where(turning, p0[:, 0] + c0 * px - s0 * py, np.nan),
                        np.where(turning, p0[:, 1] + s0 * px + c0 * py, np.nan)], axis=1)[run]
        angle = np.cumsum(np.vstack([self.angle[None, :], spin * dt]), axis=0)
        spin_cmd = np.full((m, n), np.nan)
        spin_cmd[:, d] = np.concatenate([p["targets"] for p in plans])
        steer_cmd = rep("steer_cmd")
        other = ~cs & ~st
        steer_cmd[:, other] = steer[:, other]
        modes = [p["twist_mode"] for p in plans]
        k0 = self.k
        block = Block(
            k0=k0, t=step_times(np.arange(k0, k0 + m), dt), pose=pose, twist=xi, icr=icr, slip=slip,
            cmd=rep("cmd"), spin_cmd=spin_cmd, spin=spin, steer_cmd=steer_cmd, steer=steer,
            slip_long=slip_long, slip_lat=slip_lat, angle=angle[:-1],
            shortfall=rep("shortfall"), rank=rank, twist_mode=all(modes) if len(set(modes)) == 1 else None)
        # carry the rest of the state to t_{k0+m}
        self.pose = np.array([x[-1], y[-1], theta[-1]])
        self.spin = spin[-1].copy()
        self.angle = angle[-1].copy()
        self.k = k0 + m
        return block
