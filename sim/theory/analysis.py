"""What a wheel layout can do: degrees of mobility, steerability, maneuverability,
the ICR locus, redundant drives, uncontrolled directions and steering singularities.

Definitions (body frame, twist ``xi = (vx, vy, omega)``):

* admissible twists: the null space of ``C1f`` (fixed wheels), dimension k;
  every steered wheel can point along its own contact velocity, so any of them
  can be followed;
* a *generic admissible configuration*: steer angles set for a generic twist
  in that null space (seeded samples, so the report is deterministic);
* mobility ``dm = 3 - rank C1*(beta_s)`` there;
* steerability ``ds``: the number of steering freedoms that can be used
  independently while the base still moves without slip, i.e. the rank of the
  map from admissible twists to steer angles, ``d beta_s / d xi`` restricted to
  the null space of ``C1f`` (scaling a twist leaves the angles alone, so
  ``ds <= k - 1``).  Two steered wheels tied by a fixed axle through the ICR
  count once;
* maneuverability ``dM = dm + ds``.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from sim.theory.constraints import contact_velocity, rolling_rows, sliding_rows, stack
from sim.theory.kinematics import RANK_TOL, twist_scale
from sim.model.robot import Robot

CLASSES = {
    (3, 0): "omnidirectional",
    (2, 0): "differential-drive type",
    (2, 1): "omni-steer type",
    (1, 1): "car-like / tricycle type",
    (1, 2): "two-steer type",
    (1, 0): "single-motion type",
}
_SAMPLES = 6
_SEED = 20261201


def rank(M, tol=RANK_TOL) -> int:
    """Numerical rank: singular values above ``tol * max(1, largest)``."""
    M = np.atleast_2d(np.asarray(M, dtype=float))
    if M.size == 0:
        return 0
    s = np.linalg.svd(M, compute_uv=False)
    return int(np.sum(s > tol * max(1.0, s[0])))


def null_basis(M, ncols=3, tol=RANK_TOL) -> np.ndarray:
    """Orthonormal basis, shape (ncols, k), of the null space of ``M`` (m, ncols)."""
    M = np.asarray(M, dtype=float).reshape(-1, ncols)
    if len(M) == 0:
        return np.eye(ncols)
    _, s, vt = np.linalg.svd(M)
    r = int(np.sum(s > tol * max(1.0, s[0])))
    return vt[r:].T


@dataclass
class Analysis:
    """The report on a base; see module docstring for the definitions."""

    robot: str
    mobility: int
    steerability: int
    maneuverability: int
    omnidirectional: bool
    kind: str
    icr: dict
    driven: list
    redundant: list
    relations: list
    uncontrolled: list
    singularities: list = field(default_factory=list)
    warnings: list = field(default_factory=list)
    generic_steer: dict = field(default_factory=dict)

    def as_dict(self) -> dict:
        return {
            "robot": self.robot,
            "mobility": self.mobility,
            "steerability": self.steerability,
            "maneuverability": self.maneuverability,
            "omnidirectional": self.omnidirectional,
            "class": self.kind,
            "icr": self.icr,
            "driven_wheels": self.driven,
            "redundant_wheels": self.redundant,
            "consistency_relations": self.relations,
            "uncontrolled_directions": self.uncontrolled,
            "singularities": self.singularities,
            "warnings": self.warnings,
        }


def steer_for_twist(robot: Robot, xi, heading=None) -> np.ndarray:
    """Headings (n,) with every steered wheel along its contact velocity for ``xi``."""
    a = robot.arrays
    h = (a.heading if heading is None else np.asarray(heading, float)).copy()
    v = contact_velocity(a.x, a.y, xi)
    st = a.is_("steered")
    h[st] = np.arctan2(v[st, 1], v[st, 0])
    return h


def steer_jacobian(robot: Robot, xi) -> np.ndarray:
    """d(heading)/d(xi), shape (n_steered, 3), of steered wheels aligned with ``xi``."""
    a = robot.arrays
    st = a.is_("steered")
    x, y = a.x[st], a.y[st]
    v = contact_velocity(x, y, xi)
    n2 = np.sum(v ** 2, axis=1)[:, None]
    return np.stack([-v[:, 1], v[:, 0], v[:, 0] * x + v[:, 1] * y], axis=1) / n2


def _generic_twists(robot: Robot, N: np.ndarray):
    """Seeded generic twists in span(N) (scaled metric) with every steered contact moving."""
    a = robot.arrays
    rng = np.random.default_rng(_SEED)
    S = twist_scale(robot)
    st = a.is_("steered")
    out = []
    tries = 0
    while len(out) < _SAMPLES and tries < 200:
        tries += 1
        xi = (N @ rng.normal(size=N.shape[1])) * S
        v = contact_velocity(a.x[st], a.y[st], xi)
        if np.all(np.hypot(v[:, 0], v[:, 1]) > 1e-3 * np.linalg.norm(xi / S)):
            out.append(xi)
    return out


def analyze(robot: Robot) -> Analysis:
    """Analyse a base (see module docstring)."""
    a = robot.arrays
    S = twist_scale(robot)
    fx, st = a.is_("fixed"), a.is_("steered")
    C1f = sliding_rows(a.x[fx], a.y[fx], a.heading[fx]).reshape(-1, 3)
    N = null_basis(C1f * S)
    k = N.shape[1]
    names = [w.name for w in robot.wheels]
    driven = [w.name for w in robot.wheels if w.driven]
    warnings = _layout_warnings(robot)
    if k == 0:
        return Analysis(robot.name, 0, 0, 0, False, "cannot move", {"kind": "none",
                        "text": "none: the fixed wheels' axles do not meet in one point, so the base cannot move without skidding"},
                        driven, [], [], [], [], warnings)
    twists = _generic_twists(robot, N) if np.any(st) else [(N @ np.ones(k)) * S]
    best = None
    for xi in twists:
        h = steer_for_twist(robot, xi)
        c1 = sliding_rows(a.x[fx | st], a.y[fx | st], h[fx | st]).reshape(-1, 3)
        dm = 3 - rank(c1 * S)
        ds = rank(steer_jacobian(robot, xi) @ (N * S[:, None])) if np.any(st) else 0
        cand = (ds, dm, h)
        if best is None or (ds, -dm) > (best[0], -best[1]):
            best = cand
    ds, dm, h = best
    dM = dm + ds
    kind = CLASSES.get((dm, ds), f"({dm}, {ds}) type")
    icr = _icr_locus(robot, C1f, k, N, S, ds)
    # drive authority over the motions the base can make at the generic configuration
    c1 = sliding_rows(a.x[fx | st], a.y[fx | st], h[fx | st]).reshape(-1, 3)
    Nm = null_basis(c1 * S)
    didx = np.flatnonzero(a.driven)
    J1 = rolling_rows(a.x[didx], a.y[didx], h[didx], a.roller[didx]).reshape(-1, 3)
    M = (J1 * S) @ Nm if len(didx) else np.zeros((0, Nm.shape[1]))
    independent, redundant = [], []
    for i in range(len(didx)):
        if rank(M[independent + [i]]) > len(independent):
            independent.append(i)
        else:
            redundant.append(names[didx[i]])
    relations = []
    if redundant and not np.any(a.is_("steered") | (a.is_("castor") & a.driven)):
        rc = a.radius[didx] * np.cos(a.roller[didx])
        for i in range(len(didx)):
            if names[didx[i]] not in redundant:
                continue
            c = np.linalg.lstsq(M[independent].T, M[i], rcond=None)[0] * rc[independent] / rc[i]
            terms = " ".join(f"{v:+.4g}*{names[didx[j]]}" for v, j in zip(c, independent) if abs(v) > 1e-9)
            relations.append(f"{names[didx[i]]} = {terms or '0'}")
    unc = null_basis(M, ncols=Nm.shape[1]) if len(didx) else np.eye(Nm.shape[1])
    uncontrolled = []
    for j in range(unc.shape[1]):
        t = (Nm @ unc[:, j]) * S
        t = t / np.linalg.norm(t / S)
        t = t * np.sign(t[np.argmax(np.abs(t) > 1e-9)])
        uncontrolled.append({"vx": _r(t[0]), "vy": _r(t[1]), "omega": _r(t[2]),
                             "text": _twist_text(t)})
    sing = _singularities(robot, icr, dm)
    # report the generic steering as angles the wheels can take (h or h + pi, within limits)
    from sim.theory.kinematics import choose_angles
    idx = np.flatnonzero(st)
    shown, _ = choose_angles(h[idx], np.clip(0.0, a.steer_lo[idx], a.steer_hi[idx]),
                             a.steer_lo[idx], a.steer_hi[idx])
    return Analysis(robot.name, dm, ds, dM, dm == 3, kind, icr, driven, redundant, relations,
                    uncontrolled, sing, warnings,
                    {names[i]: float(v) for i, v in zip(idx, shown)})


def _r(v, nd=6):
    v = round(float(v), nd)
    return 0.0 if v == 0 else v


def _twist_text(t):
    vx, vy, w = t
    if abs(w) < 1e-9:
        return f"translation along ({vx:.3f}, {vy:.3f}) in the body frame"
    px, py = -vy / w + 0.0, vx / w + 0.0
    return f"rotation about body point ({px:.3f}, {py:.3f}) m"


def _icr_locus(robot, C1f, k, N, S, ds) -> dict:
    if k == 3:
        return {"kind": "plane", "text": "anywhere in the plane (steer or roll to place it)"}
    if k == 2:
        row = C1f[np.argmax(np.linalg.norm(C1f, axis=1))]
        c0, c1, c2 = row
        # ICR p of twist omega*(p_y, -p_x, 1): c0 p_y - c1 p_x + c2 = 0
        a_, b_, c_ = -c1, c0, -c2
        n = math.hypot(a_, b_)
        a_, b_, c_ = a_ / n, b_ / n, c_ / n
        if a_ < -1e-12 or (abs(a_) <= 1e-12 and b_ < 0):
            a_, b_, c_ = -a_, -b_, -c_
        txt = _line_text(a_, b_, c_)
        return {"kind": "line", "line": {"a": _r(a_), "b": _r(b_), "c": _r(c_)},
                "text": f"on the line {txt} (body frame, m), or at infinity along it for straight motion"}
    xi = (N[:, 0]) * S
    if abs(xi[2]) > 1e-9:
        p = (-xi[1] / xi[2], xi[0] / xi[2])
        return {"kind": "point", "point": [_r(p[0]), _r(p[1])],
                "text": f"fixed at body point ({p[0]:.3f}, {p[1]:.3f}) m: the base can only turn about it"}
    d = xi[:2] / np.linalg.norm(xi[:2])
    return {"kind": "infinity", "direction": [_r(d[0]), _r(d[1])],
            "text": f"at infinity only: the base can only translate along ({d[0]:.3f}, {d[1]:.3f})"}


def _line_text(a, b, c):
    if abs(b) < 1e-12:
        return f"x = {c / a:.3f}"
    if abs(a) < 1e-12:
        return f"y = {c / b:.3f}"
    return f"{a:.3f} x + {b:.3f} y = {c:.3f}"


def _on_locus(icr, p) -> bool:
    if icr["kind"] == "plane":
        return True
    if icr["kind"] == "line":
        l = icr["line"]
        return abs(l["a"] * p[0] + l["b"] * p[1] - l["c"]) < 1e-6
    if icr["kind"] == "point":
        return math.dist(icr["point"], p) < 1e-6
    return False


def _singularities(robot, icr, dm) -> list:
    out = []
    a = robot.arrays
    for w in robot.wheels:
        if w.type == "steered" and _on_locus(icr, (w.x, w.y)):
            out.append(f"ICR at {w.name}'s steering axis ({w.x:.3f}, {w.y:.3f}) m: its angle is undefined "
                       "there, and turning about a point close to it needs large, fast steering")
        if w.type == "steered" and w.steer_limits[1] - w.steer_limits[0] < math.pi - 1e-9:
            lo, hi = (math.degrees(v) for v in w.steer_limits)
            out.append(f"{w.name} steers over [{lo:.0f}, {hi:.0f}] deg, less than half a turn: "
                       "ICRs needing other angles are out of reach")
        if w.type == "castor":
            out.append(f"castor {w.name} flips round when the motion at its axis reverses; "
                       "while it swings the base is disturbed")
    st = [w for w in robot.wheels if w.type == "steered"]
    nfixed = int(np.sum(a.is_("fixed")))
    if nfixed == 0 and len(st) == 2:
        p, q = st
        ang = math.degrees(math.atan2(q.y - p.y, q.x - p.x) + math.pi / 2)
        out.append(f"when {p.name} and {q.name} both point at {ang:.0f} deg (or opposite), their axles "
                   "coincide and the ICR is free along the line joining them (mobility rises to 2)")
    return out


def _layout_warnings(robot) -> list:
    out = []
    ws = robot.wheels
    for i in range(len(ws)):
        for j in range(i + 1, len(ws)):
            if math.hypot(ws[i].x - ws[j].x, ws[i].y - ws[j].y) < 1e-6:
                out.append(f"{ws[i].name} and {ws[j].name} share one mount point")
    if not any(w.driven for w in ws):
        out.append("no wheel is driven: the base cannot move by itself")
    return out


def matrices(robot: Robot, heading) -> dict:
    """All matrices at headings (n,) rad: the stack, forward and inverse maps."""
    from sim.theory.kinematics import forward_matrix, inverse_matrix
    s = stack(robot, heading)
    Fm, fidx = forward_matrix(robot, heading)
    Im, iidx = inverse_matrix(robot, heading)
    return {"stack": s, "forward": Fm, "inverse": Im,
            "driven": [robot.wheels[i].name for i in iidx]}
