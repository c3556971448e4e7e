"""Effective wheel radii and mount positions fitted to recorded runs (any layout).

A recorded run is a table (CSV, or Parquet) with the ground-truth pose ``t,x,y,theta`` (world, s,
m, m, rad; from a motion-capture system, or a Trundle trace) and, per
measured wheel, ``NAME.counts`` (cumulative encoder counts, needs ``encoder``
in the robot file) or ``NAME.spin`` (rad/s held from that row to the next, as
in Trundle traces written with ``--every 1``); steered wheels and castors also
need ``NAME.steer`` (rad).  Trundle traces with an ``odometry`` section carry
the counts.

The fit: parameters p = (radius, x, y) of every measured wheel, starting from
the robot file.  The run is cut into windows of about ``WINDOW`` s; over each,
the estimator of :mod:`sim.odometry` dead-reckons the wheel readings with
geometry p, and the residual is its displacement minus the ground-truth one
(the relative pose of the window's end in its start's body frame), weighted
(1, 1, L) with L the base's size.  Windows rather than single steps because
counts are cumulative: a window's quantization error stays below one count
however long it is, while a step's can be as large as the step's own motion
(least squares would then bias the radii low).  Gauss-Newton minimises the sum of squares, with a
central-difference Jacobian and Levenberg-Marquardt damping in the SVD basis
(directions the runs do not excite keep their starting values, e.g. a wheel's
position along its own rolling direction; they are reported as undetermined).
Pure numpy.
"""
from __future__ import annotations

import math
import os
from dataclasses import dataclass, replace

import numpy as np

from sim.errors import InputError
from sim.files import fields as F
from sim.odometry.encoders import DeadReckoner
from sim.theory.se2 import integrate, wrap
from sim.model.robot import Robot
from sim.traces.read import TraceReader

KEYS = ("radius", "x", "y")
SVD_TOL = 1e-6          # singular values below this fraction of the largest: "undetermined"
MAX_ITER = 50
STEP = 1e-6             # m, finite-difference step
INCONSISTENT = 0.5      # RMS residual above this fraction of the RMS motion: the data do not fit
WINDOW = 1.0            # s, length of the windows compared with the ground truth


@dataclass(frozen=True)
class Record:
    """One recorded run, m rows.

    t : (m,) s.  pose : (m, 3) ground truth, world.  dphi : (m-1, k) rad,
    rotation of each measured wheel from row j to j+1.  heading : (m-1, q) rad,
    headings of the measured steered wheels and castors during each step.
    """

    source: str
    t: np.ndarray
    pose: np.ndarray
    dphi: np.ndarray
    heading: np.ndarray


def _measured(robot: Robot, wheels):
    idx = [robot.index[w] for w in wheels]
    return DeadReckoner(robot, idx)


def record_from_columns(cols: dict, robot: Robot, wheels, source="<trace>") -> Record:
    """A :class:`Record` from arrays by CSV column name (e.g. ``RunResult.trace``)."""
    est = _measured(robot, wheels)
    t = np.asarray(cols["t"], float)
    pose = np.stack([np.asarray(cols[c], float) for c in ("x", "y", "theta")], axis=1)
    dphi = []
    for w in wheels:
        if f"{w}.counts" in cols:
            c = np.asarray(cols[f"{w}.counts"], float)
            dphi.append(np.diff(c) * 2 * math.pi / robot.wheel(w).encoder)
        else:
            dphi.append(np.asarray(cols[f"{w}.spin"], float)[:-1] * np.diff(t))
    heading = np.stack([np.asarray(cols[f"{robot.wheels[i].name}.steer"], float)[:-1] for i in est.read], axis=1) \
        if len(est.read) else np.zeros((len(t) - 1, 0))
    return Record(source, t, pose, np.stack(dphi, axis=1), heading)


def _unit(column: str) -> tuple:
    """(unit, largest magnitude or None for the unit's) of a recorded-run column: counts may run past 1e6."""
    part = column.rpartition(".")[2] if "." in column else column
    if part == "counts":
        return "counts", float(2 ** 53)
    return {"t": ("s", None), "x": ("m", None), "y": ("m", None), "theta": ("rad", None),
            "spin": ("rad/s", None), "steer": ("rad", None)}.get(part, ("", None))


def read_record(path, robot: Robot, wheels) -> Record:
    """Read a recorded run, CSV or Parquet (see module docstring).  Raises InputError."""
    source = os.fspath(path)
    est = _measured(robot, wheels)
    need = ["t", "x", "y", "theta"]
    choose = {}
    with TraceReader(source, require_t=False) as rd:
        head = 1 if rd.kind == "csv" else None
        have = set(rd.columns)
        for w in wheels:
            if f"{w}.counts" in have:
                if robot.wheel(w).encoder is None:
                    raise InputError(source, head, f"column '{w}.counts' needs 'encoder: COUNTS' on wheel '{w}' "
                                     f"in {robot.source}")
                choose[w] = f"{w}.counts"
            elif f"{w}.spin" in have:
                choose[w] = f"{w}.spin"
            else:
                raise InputError(source, head, f"no column '{w}.counts' or '{w}.spin' for measured wheel '{w}'")
        need += list(choose.values()) + [f"{robot.wheels[i].name}.steer" for i in est.read]
        missing = [c for c in need if c not in have]
        if missing:
            raise InputError(source, head, f"missing column(s): {', '.join(missing)}")
        cols = [rd.columns.index(c) for c in need]
        units = [_unit(c) for c in need]
        limits = np.array([F.limit_for(u) if lim is None else lim for u, lim in units])
        parts, last_t = [], -math.inf
        for page in rd.pages():
            v = page.values(cols=cols)
            bad = np.argwhere(~np.isfinite(v))
            if len(bad):
                r, c = (int(x) for x in bad[0])
                got = "a blank cell" if np.isnan(v[r, c]) else repr(float(v[r, c]))
                raise page.error(r, f"column '{need[c]}': expected a finite number, got {got}")
            over = np.argwhere(np.abs(v) > limits)
            if len(over):
                r, c = (int(x) for x in over[0])
                raise page.error(r, f"column '{need[c]}': {F.describe_range(limits[c], units[c][0])}, "
                                    f"got {v[r, c]:g}")
            t = v[:, 0]
            prev = np.concatenate([[last_t], t[:-1]])
            down = np.flatnonzero(t <= prev)
            if down.size:
                i = int(down[0])
                raise page.error(i, f"'t' must increase, got {t[i]:g} after {prev[i]:g}")
            last_t = float(t[-1])
            parts.append(v)
    rows = sum(len(p) for p in parts)
    if rows < 3:
        raise InputError(source, None, f"a recorded run needs at least 3 rows, got {rows}")
    arr = np.vstack(parts)
    return record_from_columns({c: arr[:, i] for i, c in enumerate(need)}, robot, wheels, source)


def true_increments(pose) -> np.ndarray:
    """Relative poses of consecutive rows in the earlier row's body frame: (m-1, 3)."""
    d = np.diff(pose, axis=0)
    c, s = np.cos(pose[:-1, 2]), np.sin(pose[:-1, 2])
    return np.stack([c * d[:, 0] + s * d[:, 1], -s * d[:, 0] + c * d[:, 1], d[:, 2]], axis=1)


def window_bounds(t, window: float = WINDOW) -> np.ndarray:
    """Row indices (w+1,) cutting a run with times ``t`` (m,) s into windows of about ``window`` s."""
    dt = float(np.median(np.diff(t)))
    n = max(1, int(round(window / dt)))
    b = list(range(0, len(t) - 1, n)) + [len(t) - 1]
    if len(b) > 2 and b[-1] - b[-2] < n // 2:
        del b[-2]                         # no stub window at the end
    return np.array(b)


def compose_windows(inc, bounds) -> np.ndarray:
    """Body displacements (w, 3) over windows [bounds[i], bounds[i+1]) of per-step increments (m-1, 3)."""
    th = np.concatenate([[0.0], np.cumsum(inc[:, 2])])
    c, s = np.cos(th[:-1]), np.sin(th[:-1])
    x = np.concatenate([[0.0], np.cumsum(c * inc[:, 0] - s * inc[:, 1])])
    y = np.concatenate([[0.0], np.cumsum(s * inc[:, 0] + c * inc[:, 1])])
    i, j = bounds[:-1], bounds[1:]
    dx, dy = x[j] - x[i], y[j] - y[i]
    ci, si = np.cos(th[i]), np.sin(th[i])
    return np.stack([ci * dx + si * dy, -si * dx + ci * dy, th[j] - th[i]], axis=1)


def with_params(robot: Robot, params, values) -> Robot:
    """``robot`` with ``values`` (m) for ``params`` [(wheel name, key), ...]."""
    wheels = list(robot.wheels)
    for (name, key), v in zip(params, values):
        i = robot.index[name]
        wheels[i] = replace(wheels[i], **{key: float(v)})
    return replace(robot, wheels=tuple(wheels))


def replay(robot: Robot, wheels, rec: Record) -> np.ndarray:
    """Dead-reckoned poses (m, 3) of a recorded run with geometry ``robot``, from its first true pose."""
    inc = _measured(robot, wheels).increments(rec.dphi, rec.heading)
    return np.vstack([rec.pose[:1], integrate(rec.pose[0], inc)])


def track_errors(est, truth) -> dict:
    """Final and peak position (m) and heading (rad) error of poses (m, 3) against truth."""
    pos = np.hypot(est[:, 0] - truth[:, 0], est[:, 1] - truth[:, 1])
    head = np.abs(wrap(est[:, 2] - truth[:, 2]))
    return {"final_position_error": float(pos[-1]), "final_heading_error": float(head[-1]),
            "peak_position_error": float(pos.max()), "peak_heading_error": float(head.max())}


@dataclass(frozen=True)
class FitResult:
    """robot : the fitted geometry.  params : [(wheel, key)].  start, values : (P,) m.
    undetermined : params the runs do not fix (kept at their start).  rms_start,
    rms : RMS residual per window before/after (m, weighted).  motion : RMS of
    the true window displacements (same weighting).  iterations : Gauss-Newton steps.
    sigma : (P,) m, standard error of each value from the final Jacobian and the
    residual (least-squares covariance ``s^2 (J^T J)^+`` over the directions the
    runs fix, common practice; for an undetermined value, of its fixed part)."""

    robot: Robot
    params: tuple
    start: np.ndarray
    values: np.ndarray
    undetermined: tuple
    rms_start: float
    rms: float
    motion: float
    iterations: int
    sigma: np.ndarray | None = None


def fit_geometry(robot: Robot, wheels, records) -> FitResult:
    """Fit radius, x, y of the measured ``wheels`` to ``records``.  Raises InputError
    when the runs do not move the base or the wheel readings cannot explain them."""
    if not records:
        raise InputError("--fit", None, "give at least one recorded run")
    params = tuple((w, k) for w in wheels for k in KEYS)
    p0 = np.array([getattr(robot.wheel(w), k) for w, k in params], float)
    W = np.array([1.0, 1.0, robot.size])
    bounds = [window_bounds(r.t) for r in records]
    truth = [compose_windows(true_increments(r.pose), b) * W for r, b in zip(records, bounds)]
    motion = float(np.sqrt(np.mean(np.concatenate([t.ravel() for t in truth]) ** 2)))
    src = records[0].source

    def residual(p):
        rob = with_params(robot, params, p)
        est = _measured(rob, wheels)
        return np.concatenate([(compose_windows(est.increments(r.dphi, r.heading), b) * W - t).ravel()
                               for r, b, t in zip(records, bounds, truth)])

    def jacobian(p):
        J = np.empty((len(r0), len(p)))
        for j in range(len(p)):
            e = np.zeros(len(p))
            e[j] = STEP
            J[:, j] = (residual(p + e) - residual(p - e)) / (2 * STEP)
        return J

    p = p0.copy()
    r0 = residual(p)
    if motion == 0.0:
        raise InputError(src, None, "the recorded runs do not move the base; nothing to fit")
    r, cost = r0, float(r0 @ r0)
    it, lam = 0, None
    for it in range(1, MAX_ITER + 1):
        U, s, Vt = np.linalg.svd(jacobian(p), full_matrices=False)
        if not s[0] > 0:
            raise InputError(src, None, "the wheel readings do not change with the geometry: the measured wheels "
                             "did not turn in these runs")
        keep = s > SVD_TOL * s[0]  # step only where the runs fix the geometry: the rest stays at its start
        g = U[:, keep].T @ r
        lam = 1e-6 * s[0] ** 2 if lam is None else lam
        while True:                       # Levenberg-Marquardt damping of the Gauss-Newton step
            step = -(Vt[keep].T @ (g * s[keep] / (s[keep] ** 2 + lam)))
            rn = residual(p + step)
            cn = float(rn @ rn)
            if cn < cost or lam > 1e6 * s[0] ** 2:
                break
            lam *= 10.0
        if not cn < cost:
            break
        p, r, done = p + step, rn, cost - cn <= 1e-14 * cost or np.max(np.abs(step)) < 1e-13
        cost, lam = cn, lam / 10.0
        if done:
            break
    _, s, Vt = np.linalg.svd(jacobian(p), full_matrices=False)
    null = Vt[~(s > SVD_TOL * s[0])] if s[0] > 0 else Vt
    fixed = s > SVD_TOL * s[0] if s[0] > 0 else np.zeros(len(s), bool)
    dof = max(len(r) - int(np.sum(fixed)), 1)
    cov = (Vt[fixed].T / s[fixed] ** 2) @ Vt[fixed] * float(r @ r) / dof
    sigma = np.sqrt(np.maximum(np.diag(cov), 0.0))
    undetermined = tuple(f"{w}.{k}" for (w, k), v in zip(params, np.linalg.norm(null, axis=0)) if v > 0.1) \
        if len(null) else ()
    rms = float(np.sqrt(np.mean(r ** 2)))
    if rms > INCONSISTENT * motion or np.any(p[[i for i, (_, k) in enumerate(params) if k == "radius"]] <= 0):
        raise InputError(src, None, f"inconsistent recorded runs: with the best geometry the wheel readings still "
                         f"miss the recorded motion by {rms:.3g} (RMS, m) against a motion of {motion:.3g}; check "
                         "the wheel columns, their units (counts or rad/s) and the pose columns (world frame, rad)")
    return FitResult(with_params(robot, params, p), params, p0, p, undetermined,
                     float(np.sqrt(np.mean(r0 ** 2))), rms, motion, it, sigma)
