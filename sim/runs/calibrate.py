"""Odometry calibration of differential-drive bases: the bidirectional square-path test.

The method is Borenstein & Feng's (J. Borenstein, L. Feng, "Measurement and
correction of systematic odometry errors in mobile robots", IEEE Trans.
Robotics and Automation 12(6), 1996), written here from memory of the paper.
The base drives a square of side L by its own odometry, n times clockwise
(right turns) and n times counter-clockwise (left turns), from the same start.
Each return error is where the base really stopped minus where its odometry
says it stopped, in the start frame (x along the first leg, y to the left, m).
Two systematic errors explain the centres of gravity of the two clouds:

* type A, wheelbase: the effective wheelbase is ``Eb`` times the nominal, so
  every 90 deg turn falls short by ``alpha`` (in both directions);
* type B, wheel diameters: the right-to-left diameter ratio is ``Ed``, so
  every straight leg bends left by ``beta`` (in both directions).

To first order (our frame; a sympy expansion of the exact square gives the
same): ``x_cw = y_cw = -2L(alpha + beta)``, ``x_ccw = -y_ccw = 2L(beta - alpha)``.
Inverted, with the centres of gravity (means) of each direction:

    alpha = (x_cw + x_ccw) / (-4L)   and   alpha = (y_cw - y_ccw) / (-4L)
    beta  = (x_cw - x_ccw) / (-4L)   and   beta  = (y_cw + y_ccw) / (-4L)
    R  = (L/2) / sin(beta/2)                     radius of the bent legs
    Ed = (R + b/2) / (R - b/2)                   D_right / D_left
    Eb = 90 deg / (90 deg - alpha)               b_actual / b_nominal

We average the two estimates of alpha and of beta, and take ``b`` in the Ed
relation as the corrected wheelbase ``Eb b`` (the paper, from memory, writes
b; the difference is second order).  Corrections, keeping the mean diameter:
``c_L = 2 / (Ed + 1)``, ``c_R = 2 / (1/Ed + 1)`` multiply the nominal radii,
``Eb`` the nominal wheelbase (symmetric about the axle midpoint).  The figure
of merit is ``E_max = max(|cg_cw|, |cg_ccw|)``.

Consistency.  The two estimates of alpha (of beta) are not equal on a real
base: the exact square (:func:`square_returns`: legs bent by beta, turns short
by alpha) puts them apart by its higher-order terms, to second order (a sympy
expansion) ``alpha_x - alpha_y = -(3 alpha^2 + 4 beta^2)`` and
``beta_x - beta_y = -7 alpha beta``.  :func:`analyse` fits alpha and beta of the
exact square to the sums (``alpha_x + alpha_y``, ``beta_x + beta_y``) and
accepts a difference between 0 (the first-order relations) and the exact
square's, widened by an allowance: ``K_SCATTER`` standard errors of the
difference (from the scatter of the runs about their centres of gravity, with
``RESOLUTION`` as the floor of each coordinate's error, the whole capped at
``SCATTER_CAP``) plus ``MODEL_REL`` of the larger error angle for what the
square leaves out (a measuring frame turned by 1 deg moves alpha_x - alpha_y
by about 2 deg x beta, i.e. 3.5 % of beta).  Anything else is refused.

Here the simulated test drives the square as exact wheel rotations computed
from the *believed* geometry (what a controller closing the loop on its
encoders does), on the engine with the *true* geometry; acceleration and speed
limits are lifted for this drive.  Other layouts: :mod:`sim.geomfit`.
"""
from __future__ import annotations

import math
import os
from dataclasses import dataclass, replace

import numpy as np

from sim.files import fields as F
from sim.engine.simulator import Simulator
from sim.errors import InputError, quote
from sim.files.table import is_parquet, read_table
from sim.theory.kinematics import inverse_matrix
from sim.odometry.encoders import Odometer, OdometrySpec
from sim.model.robot import Robot
from sim.files.yamlread import load_file

MIN_RUNS = 3                  # per direction; Borenstein & Feng use 5
DEFAULT_SIDE = 4.0            # m, as in the paper
K_SCATTER = 4.0               # standard errors of the x - y difference allowed for the scatter of the runs
RESOLUTION = 1e-3             # m: floor of each centre-of-gravity coordinate's error (a return measured to 1 mm)
SCATTER_CAP = math.radians(0.5)   # rad: the scatter allowance never exceeds this, however wide the runs scatter
MODEL_REL = 0.05              # fraction of max(|alpha|, |beta|) allowed for effects the square model leaves out


@dataclass(frozen=True)
class DiffDrive:
    """The drive axle of a differential-drive base: wheel names, wheelbase b (m),
    axle midpoint (x, y) in the body frame (m)."""

    left: str
    right: str
    b: float
    mid: tuple


def diff_drive(robot: Robot) -> DiffDrive:
    """The drive axle, or InputError if ``robot`` is not a differential-drive base
    (exactly two driven fixed wheels on one axle square to body x)."""
    driven = [w for w in robot.wheels if w.driven]
    why = None
    if len(driven) != 2 or any(w.type != "fixed" for w in driven):
        why = (f"it has {len(driven)} driven wheel(s) ({', '.join(f'{w.name}: {w.type}' for w in driven) or 'none'})"
               "; the square test needs exactly two driven fixed wheels")
    else:
        p, q = driven
        tol = 1e-9 * robot.size
        if any(abs(math.sin(w.heading)) > 1e-9 for w in driven):
            why = "its drive wheels do not roll along body x (heading 0 or 180 deg)"
        elif abs(p.x - q.x) > tol or abs(p.y - q.y) <= tol:
            why = "its two drive wheels are not on one axle (same x, different y)"
    if why:
        raise InputError(robot.source, None,
                         f"calibrate's square test needs a differential-drive base, and {robot.name} is not one: "
                         f"{why}. For other layouts fit the geometry to recorded runs (--fit RUN.csv)")
    left, right = sorted(driven, key=lambda w: -w.y)
    return DiffDrive(left.name, right.name, left.y - right.y, (0.5 * (left.x + right.x), 0.5 * (left.y + right.y)))


@dataclass(frozen=True)
class SquareRuns:
    """Return errors of a square test: ``cw``, ``ccw`` shape (n, 2) m (start frame),
    ``side`` L m; ``source`` where they came from, ``lines`` of the two lists."""

    side: float
    cw: np.ndarray
    ccw: np.ndarray
    source: str = "simulation"
    lines: tuple = (None, None)


@dataclass(frozen=True)
class Umbmark:
    """The analysis of a square test (lengths m, angles rad).

    cg_cw, cg_ccw : (2,) centres of gravity; r_cw, r_ccw their distances from
    0; e_max = max(r_cw, r_ccw).  alpha, beta: the averages of the two
    estimates of each (``alpha_x`` from the x errors, ``alpha_y`` from the y
    errors, ...), which give the corrections.  radius : R, inf when beta = 0.
    Ed, Eb : the error factors.

    The consistency check: ``alpha_fit``, ``beta_fit`` of the exact square
    fitted to the sums; ``expect_alpha``, ``expect_beta`` its x - y
    differences; ``scatter`` the standard error of an x - y difference (from
    the runs, at least the ``RESOLUTION`` floor); ``allowance`` what the check
    allows beyond [0, expect] (the same for alpha and beta); ``capped`` True
    when the scatter part hit ``SCATTER_CAP``.
    """

    side: float
    cg_cw: np.ndarray
    cg_ccw: np.ndarray
    r_cw: float
    r_ccw: float
    e_max: float
    alpha: float
    beta: float
    alpha_x: float
    alpha_y: float
    beta_x: float
    beta_y: float
    radius: float
    Ed: float
    Eb: float
    alpha_fit: float = 0.0
    beta_fit: float = 0.0
    expect_alpha: float = 0.0
    expect_beta: float = 0.0
    scatter: float = 0.0
    allowance: float = 0.0
    capped: bool = False

    def model_tolerance(self) -> np.ndarray:
        """(2,) m: how far (cw, ccw) the centres of gravity of the exact square with
        the averaged alpha, beta (what the corrected file drives) may lie from the
        measured ones when the data pass the consistency check: the fit's residual
        is at most sqrt(2) L (|expect_alpha| + |expect_beta| + 2 allowance), plus the
        shift from the fitted to the averaged angles."""
        fit = square_returns(self.alpha_fit, self.beta_fit, self.side)
        avg = square_returns(self.alpha, self.beta, self.side)
        shift = np.hypot(*(avg - fit).T)
        resid = math.sqrt(2) * self.side * (abs(self.expect_alpha) + abs(self.expect_beta) + 2 * self.allowance)
        return resid + shift


def centres(runs: SquareRuns) -> tuple:
    """(cg_cw (2,), cg_ccw (2,), E_max) of a square test, m."""
    cw, ccw = runs.cw.mean(axis=0), runs.ccw.mean(axis=0)
    return cw, ccw, max(float(np.hypot(*cw)), float(np.hypot(*ccw)))


def square_returns(alpha: float, beta: float, side: float) -> np.ndarray:
    """Return errors (2, 2) m, rows cw and ccw (start frame), of the exact square:
    each of the four legs an arc of length ``side`` bending left by ``beta`` rad,
    each 90 deg turn (in place) short by ``alpha`` rad.  To first order these are
    Borenstein & Feng's ``x_cw = y_cw = -2L(alpha + beta)``, ``x_ccw = -y_ccw = 2L(beta - alpha)``."""
    chord = side if beta == 0.0 else 2.0 * (side / beta) * math.sin(beta / 2.0)
    out = np.zeros((2, 2))
    for row, d in enumerate((-1, 1)):
        th = 0.0
        for _ in range(4):
            out[row] += chord * np.array([math.cos(th + beta / 2), math.sin(th + beta / 2)])
            th += beta + d * (math.pi / 2 - alpha)
    return out


def estimates(cg_cw, cg_ccw, side: float) -> np.ndarray:
    """Borenstein & Feng's two estimates of each angle, (alpha_x, alpha_y, beta_x, beta_y) rad,
    from the centres of gravity (2,) m of a square of side ``side`` m."""
    (xcw, ycw), (xccw, yccw) = cg_cw, cg_ccw
    return np.array([xcw + xccw, ycw - yccw, xcw - xccw, ycw + yccw]) / (-4.0 * side)


def fit_square(sum_alpha: float, sum_beta: float, side: float) -> tuple | None:
    """(alpha, beta) rad of the exact square whose estimates have these sums
    (``alpha_x + alpha_y``, ``beta_x + beta_y``); Newton's method from half the
    sums.  None when it does not converge (errors too large for the method)."""
    target = np.array([sum_alpha, sum_beta])

    def sums(p):
        e = estimates(*square_returns(p[0], p[1], side), side)
        return np.array([e[0] + e[1], e[2] + e[3]])

    p, h = 0.5 * target, 1e-7
    for _ in range(30):
        J = np.column_stack([(sums(p + d) - sums(p - d)) / (2 * h) for d in (np.array([h, 0.0]), np.array([0.0, h]))])
        try:
            step = np.linalg.solve(J, target - sums(p))
        except np.linalg.LinAlgError:
            return None
        p = p + step
        if not np.all(np.isfinite(p)) or np.max(np.abs(p)) > math.pi / 4:
            return None
        if np.max(np.abs(step)) < 1e-13:
            return float(p[0]), float(p[1])
    return None


def _deg(v: float) -> str:
    return f"{math.degrees(v):.3g} deg"


def analyse(runs: SquareRuns, b: float) -> Umbmark:
    """Error factors from a square test on a base of nominal wheelbase ``b`` (m).

    Raises InputError for too few runs or data the two error types cannot explain
    (see the module docstring, "Consistency").
    """
    for name, arr, line in (("cw", runs.cw, runs.lines[0]), ("ccw", runs.ccw, runs.lines[1])):
        if len(arr) < MIN_RUNS:
            raise InputError(runs.source, line,
                             f"{name}: {len(arr)} run(s); the square test needs at least {MIN_RUNS} in each "
                             "direction (Borenstein & Feng use 5) to separate systematic from random error")
    L = runs.side
    line = runs.lines[0] or runs.lines[1]
    (xcw, ycw), (xccw, yccw), e_max = centres(runs)
    ax, ay, bx, by = estimates((xcw, ycw), (xccw, yccw), L)
    alpha, beta = 0.5 * (ax + ay), 0.5 * (bx + by)
    if abs(alpha) >= math.pi / 4:
        raise InputError(runs.source, line, f"inconsistent square test: turns off by "
                         f"{math.degrees(alpha):.3g} deg each; the method needs small errors")
    fit = fit_square(ax + ay, bx + by, L)
    if fit is None:
        raise InputError(runs.source, line, f"inconsistent square test: no square with turns short by a fixed "
                         f"angle and legs bent by a fixed angle has these centres of gravity (alpha about "
                         f"{_deg(alpha)}, beta about {_deg(beta)}); the method needs small errors")
    e = estimates(*square_returns(*fit, L), L)
    expect = {"alpha": e[0] - e[1], "beta": e[2] - e[3]}
    # standard error of an x - y difference: four centre-of-gravity coordinates, each with
    # its own standard error (at least RESOLUTION), over 4L
    se2 = np.concatenate([runs.cw.var(axis=0, ddof=1) / len(runs.cw), runs.ccw.var(axis=0, ddof=1) / len(runs.ccw)])
    scatter = float(np.sqrt(np.sum(np.maximum(se2, RESOLUTION ** 2)))) / (4 * L)
    noise = K_SCATTER * scatter
    capped = noise > SCATTER_CAP
    allowance = min(noise, SCATTER_CAP) + MODEL_REL * max(abs(fit[0]), abs(fit[1]))
    bad = []
    for what, u, v in (("alpha", ax, ay), ("beta", bx, by)):
        lo, hi = min(0.0, expect[what]), max(0.0, expect[what])
        outside = max(lo - (u - v), (u - v) - hi, 0.0)
        if outside > allowance:
            label = "alpha (turn error)" if what == "alpha" else "beta (leg curvature)"
            bad.append(f"{label} is {math.degrees(u):.4g} deg from the x errors but {math.degrees(v):.4g} deg "
                       f"from the y errors (x - y = {math.degrees(u - v):+.3g} deg); at these errors the exact "
                       f"square gives x - y between {math.degrees(lo):.3g} and {math.degrees(hi):.3g} deg, and "
                       f"the data are {_deg(outside)} outside that, more than the {_deg(allowance)} allowed")
    if bad:
        why = (f"the allowance for scatter is capped at {_deg(SCATTER_CAP)}: the runs scatter widely "
               f"(standard error of x - y {_deg(scatter)}); more runs narrow it" if capped else
               f"standard error of x - y {_deg(scatter)} from the scatter of the runs, "
               f"{K_SCATTER:g} times that plus {MODEL_REL:.0%} of the larger angle allowed")
        raise InputError(runs.source, line,
                         "inconsistent square test: " + "; and ".join(bad) + f" ({why}). Wheelbase and diameter "
                         "errors cannot explain these returns. Check the frame (x along the first leg, y to the "
                         "left), the sign (actual minus odometry), that cw and ccw are not swapped, and the side "
                         "length")
    Eb = (math.pi / 2) / (math.pi / 2 - alpha)
    bb = Eb * b
    if beta == 0.0:
        R, Ed = math.inf, 1.0
    else:
        R = (L / 2) / math.sin(beta / 2)
        if abs(R) <= bb / 2:
            raise InputError(runs.source, line, f"inconsistent square test: the legs would bend on a "
                             f"radius of {abs(R):.3g} m, inside the wheelbase; the method needs small errors")
        Ed = (R + bb / 2) / (R - bb / 2)
    return Umbmark(L, np.array([xcw, ycw]), np.array([xccw, yccw]), float(np.hypot(xcw, ycw)),
                   float(np.hypot(xccw, yccw)), e_max, alpha, beta, ax, ay, bx, by, R, Ed, Eb,
                   fit[0], fit[1], expect["alpha"], expect["beta"], scatter, allowance, capped)


def corrected_uncertainty(u: Umbmark, robot: Robot, dd: DiffDrive) -> dict:
    """Standard errors (m) of the corrected values, ``{(wheel, "radius" | "y"): sigma}``.

    alpha and beta are each the mean of two estimates whose difference has the
    standard error ``scatter`` (see :func:`analyse`), so each has about
    ``scatter / 2``.  Propagated to first order (small errors): ``Eb = 90 deg /
    (90 deg - alpha)`` moves each wheel's y by ``(b/2) dEb`` with ``dEb = Eb^2
    dalpha / (pi/2)``; ``Ed`` is about ``1 + b beta / L`` (legs of radius
    ``R = L / beta``), and each radius moves by ``r dEd / 2``.
    """
    s = 0.5 * max(u.scatter, 1e-12)
    b = dd.b
    out = {}
    for name in (dd.left, dd.right):
        r = robot.wheel(name).radius
        out[(name, "radius")] = r * (b * u.Eb / u.side) * s / 2
        out[(name, "y")] = (b / 2) * u.Eb ** 2 * s / (math.pi / 2)
    return out


def corrected_robot(robot: Robot, dd: DiffDrive, Ed: float, Eb: float) -> Robot:
    """``robot`` (the believed geometry) with the drive radii scaled by c_L, c_R and
    the wheelbase by Eb about the axle midpoint."""
    cl, cr = 2.0 / (Ed + 1.0), 2.0 / (1.0 / Ed + 1.0)
    wheels = list(robot.wheels)
    ym = dd.mid[1]
    for name, c in ((dd.left, cl), (dd.right, cr)):
        i = robot.index[name]
        w = wheels[i]
        wheels[i] = replace(w, radius=w.radius * c, y=ym + Eb * (w.y - ym))
    return replace(robot, wheels=tuple(wheels))


# -- the simulated test --------------------------------------------------------
def belief_spec(true: Robot, belief: Robot, wheels, count_noise=0.0, slip_noise=0.0) -> OdometrySpec:
    """An :class:`OdometrySpec` whose nominal values are ``belief``'s geometry.

    Raises InputError unless both robots have the same wheels (names, types, order)."""
    if [(w.name, w.type) for w in true.wheels] != [(w.name, w.type) for w in belief.wheels]:
        raise InputError(true.source, None, f"the true robot's wheels (names and types) must match "
                         f"{belief.source}'s: {', '.join(w.name for w in belief.wheels)}")
    nominal = []
    for t, b in zip(true.wheels, belief.wheels):
        keys = ("radius", "x", "y") + (("heading",) if t.type in ("fixed", "swedish") else ())
        nominal += [(t.name, k, getattr(b, k)) for k in keys if getattr(b, k) != getattr(t, k)]
    return OdometrySpec(tuple(sorted(wheels, key=true.index.get)), tuple(nominal), count_noise, slip_noise)


def _unlimited(robot: Robot) -> Robot:
    return replace(robot, wheels=tuple(replace(w, max_spin=math.inf, max_spin_accel=math.inf)
                                       for w in robot.wheels))


def _drive_only(robot: Robot, keep) -> Robot:
    """``robot`` without the wheels that add no row to the body motion (castors, balls,
    undriven Swedish wheels) unless named in ``keep``: they follow the body and do not
    change it, so the square drives the same, faster."""
    silent = lambda w: w.type in ("castor", "ball") or (w.type == "swedish" and not w.driven)
    return replace(robot, wheels=tuple(w for w in robot.wheels if w.name in keep or not silent(w)))


def drive_square(true: Robot, belief: Robot, direction: int, side=DEFAULT_SIDE, speed=0.4, turn_rate=1.0,
                 dt=0.05, spec: OdometrySpec | None = None, rng=None) -> np.ndarray:
    """Drive one square; returns the return error (2,) m: true minus odometry, start frame.

    ``direction`` +1 turns left (ccw), -1 right (cw).  ``speed`` m/s and
    ``turn_rate`` rad/s set how many steps of ``dt`` s each leg and turn take;
    every leg and turn is an exact wheel rotation of the believed geometry.
    """
    dd = diff_drive(belief)
    spec = spec or belief_spec(true, belief, (dd.left, dd.right))
    for w in spec.wheels:
        if true.wheel(w).encoder is None:
            raise InputError(true.source, true.wheel(w).line, f"wheel '{w}' needs 'encoder: COUNTS' for odometry")
    M, idx = inverse_matrix(belief, belief.arrays.heading)
    names = [belief.wheels[i].name for i in idx]
    mx, my = dd.mid
    quarter = direction * math.pi / 2
    segments = []
    for _ in range(4):
        segments.append((np.array([side, 0.0, 0.0]), max(1, math.ceil(side / (speed * dt) - 1e-9))))
        segments.append((np.array([quarter * my, -quarter * mx, quarter]),
                         max(1, math.ceil(abs(quarter) / (turn_rate * dt) - 1e-9))))
    sim = Simulator(_unlimited(true), dt)
    odo = Odometer(spec, true, dt, rng=rng)
    for twist, n in segments:
        spins = (M @ twist) / (n * dt)
        sim.command_wheels(dict(zip(names, spins.tolist())))
        _advance(sim, odo, n)
    sim.stop()
    end = _advance(sim, odo, 1)

    def point(pose):
        c, s = math.cos(pose[2]), math.sin(pose[2])
        return np.array([pose[0] + c * mx - s * my, pose[1] + s * mx + c * my])

    return point(end) - point(odo.pose)


def _advance(sim, odo: Odometer, n: int) -> np.ndarray:
    """``n`` steps under the current commands, fed to the odometer; the true pose (3,) of the last row."""
    block = sim.advance(n)
    odo.update_block(block)
    return block.pose[-1]


def square_test(true: Robot, belief: Robot, runs=5, side=DEFAULT_SIDE, speed=0.4, turn_rate=1.0, dt=0.05,
                count_noise=0.0, seed=None) -> SquareRuns:
    """``runs`` squares each way (cw first) on ``true``, driven and dead-reckoned by ``belief``."""
    dd = diff_drive(belief)
    belief_spec(true, belief, (dd.left, dd.right))
    true, belief = _drive_only(true, (dd.left, dd.right)), _drive_only(belief, (dd.left, dd.right))
    spec = belief_spec(true, belief, (dd.left, dd.right), count_noise)
    rng = np.random.default_rng(seed) if count_noise > 0 else None
    out = {}
    for d, name in ((-1, "cw"), (1, "ccw")):
        out[name] = np.array([drive_square(true, belief, d, side, speed, turn_rate, dt, spec, rng)
                              for _ in range(runs)])
    return SquareRuns(side, out["cw"], out["ccw"])


# -- measured returns from a file ----------------------------------------------
def read_runs(path, side: float | None = None) -> SquareRuns:
    """Return errors taken on a real base: YAML ``{side, cw: [[x, y], ...], ccw: [...]}``
    or a table (CSV, or Parquet) with columns ``direction,x,y`` (direction cw or
    ccw).  m, start frame, actual minus odometry.  ``side`` (m) from the command
    line, if given."""
    source = os.fspath(path)
    if source.lower().endswith(".csv") or is_parquet(source):
        return _read_table(source, side)
    data = load_file(source, what="file of return errors")
    where = F.Where(source, "", getattr(data, "line", 1) or 1)
    data = F.expect_map(data, where, "a mapping {side, cw, ccw}")
    F.check_keys(data, ("side", "cw", "ccw", "description"), where, required=("cw", "ccw"))
    L = _side(data, where, side)
    lists, lines = {}, []
    for key in ("cw", "ccw"):
        w = where.at(data, key)
        items = F.expect_list(data[key], w, "a list of return errors [x, y] (m)")
        pts = []
        for j, item in enumerate(items):
            iw = w.at(items, j)
            if isinstance(item, dict):
                F.check_keys(item, ("x", "y"), iw, required=("x", "y"))
                pts.append((F.number(item["x"], iw.at(item, "x"), unit="m"),
                            F.number(item["y"], iw.at(item, "y"), unit="m")))
            else:
                pair = F.expect_list(item, iw, "a return error [x, y] or {x, y} (m)")
                if len(pair) != 2:
                    raise iw.error(f"expected [x, y], got {len(pair)} values")
                pts.append(tuple(F.number(v, iw.at(pair, k), unit="m") for k, v in enumerate(pair)))
        lists[key] = np.array(pts, dtype=float).reshape(-1, 2)
        lines.append(w.line)
    return SquareRuns(L, lists["cw"], lists["ccw"], source, tuple(lines))


def _side(data, where, side):
    if "side" in data:
        L = F.number(data["side"], where.at(data, "side"), positive=True, unit="m")
        if side is not None and side != L:
            raise where.at(data, "side").error(f"the file says side {L:g} m but --side says {side:g} m")
        return L
    return DEFAULT_SIDE if side is None else side


def _read_table(source, side):
    table = read_table(source, "empty file; expected a header row direction,x,y")
    pts = {"cw": [], "ccw": []}
    first = {"cw": None, "ccw": None}
    header = [h.lower() for h in table.header]
    if sorted(header) != ["direction", "x", "y"]:
        raise InputError(source, table.header_line,
                         f"expected the columns direction,x,y (in any order), got {quote(','.join(header))}")
    col = {h: i for i, h in enumerate(header)}
    for ln, row in table.rows:
        d = table.text(row[col["direction"]]).strip().lower()
        if d not in pts:
            raise table.error(ln, f"direction must be cw or ccw, got {quote(table.text(row[col['direction']]))}")
        pts[d].append([table.number(row[col[c]], ln, c, "m") for c in ("x", "y")])
        first[d] = first[d] or (ln if isinstance(ln, int) else None)
    L = DEFAULT_SIDE if side is None else side
    return SquareRuns(L, np.array(pts["cw"], float).reshape(-1, 2), np.array(pts["ccw"], float).reshape(-1, 2),
                      source, (first["cw"], first["ccw"]))


# -- output --------------------------------------------------------------------
def _num(v: float) -> str:
    return repr(float(v)) if math.isfinite(v) else ("inf" if v > 0 else "-inf")


def _ang(v: float) -> str:
    """An angle for a robot file: 'D deg' when that reads back to the same float, else rad."""
    d = f"{math.degrees(v):.10g}"
    return f"{d} deg" if math.radians(float(d)) == v else repr(float(v))


def robot_yaml(robot: Robot, comments=()) -> str:
    """A robot file (README "Robot file") describing ``robot``; ``comments`` head it."""
    out = [f"# {c}" for c in comments]
    out += [f"name: {robot.name}", f"footprint: {{length: {_num(robot.length)}, width: {_num(robot.width)}}}",
            "wheels:"]
    for w in robot.wheels:
        out += [f"  - name: {w.name}", f"    type: {w.type}", f"    x: {_num(w.x)}", f"    y: {_num(w.y)}",
                f"    heading: {_ang(w.heading)}", f"    radius: {_num(w.radius)}"]
        if w.driven != (w.type in ("fixed", "steered", "swedish")):
            out.append(f"    driven: {'true' if w.driven else 'false'}")
        for key in ("max_spin", "max_spin_accel", "max_steer_rate"):
            if math.isfinite(getattr(w, key)):
                out.append(f"    {key}: {_num(getattr(w, key))}")
        if w.encoder is not None:
            out.append(f"    encoder: {w.encoder}")
        if w.type == "steered" and w.steer_limits != (-math.inf, math.inf):
            lo, hi = w.steer_limits
            out.append(f"    steer_limits: [{_ang(lo)}, {_ang(hi)}]")
        if w.steer_resolution is not None:
            out.append(f"    steer_resolution: {_ang(w.steer_resolution)}")
        if w.type == "castor":
            out.append(f"    trail: {_num(w.trail)}")
        if w.type == "swedish":
            out.append(f"    roller: {_ang(w.roller)}")
    return "\n".join(out) + "\n"
