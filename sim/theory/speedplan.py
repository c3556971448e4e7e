"""The fastest way a base can drive a route: speed along the path, stops, turns, re-steering.

How a base follows a route depends on what its fixed wheels allow (:func:`motion_of`):

* ``free`` -- no fixed wheel restricts the body (mobility 3, or every standard wheel
  steered): the tracked point is the body origin and the heading is free; it is held
  (or changes evenly along the path between the headings given at waypoints, the
  shorter way round);
* ``line`` -- the ICR lies on a line of the body (differential and car-like bases):
  the tracked point is the point of that line nearest the body origin (the middle of a
  differential axle), which moves square to the line, so the base faces along the path;
  at a sharp corner it turns in place about that point when its wheels can, and a route
  that needs it refuses the base when they cannot;
* ``none`` -- at most one motion is allowed (parallel fixed axles): no route.

Along the sampled path (:meth:`sim.model.route.Route.sample`) the body twist per unit
path speed ``xi(s)`` (3,) and its derivative are exact; every driven wheel's spin is
``J_i(s) v`` with ``J_i`` from the rolling rows (fixed and Swedish wheels) or from its
contact speed (steered wheels, which point along their contact velocity), and every
steered wheel's angle ``beta_i(s)`` follows its contact velocity, continuous modulo pi
and within its limits.  With ``x = v^2`` and ``u = dv/dt`` the limits are

* ``max_spin``: ``J_i^2 x <= max_spin_i^2``; ``max_steer_rate``: ``beta_i'^2 x <= rate_i^2``;
  the route's ``speed``: ``x <= speed^2``;
* ``max_spin_accel``: ``|J_i' x + J_i u| <= max_spin_accel_i``.

The speed profile is the time-optimal one under these, computed by reachability
analysis: time-optimal path parameterization by reachability (TOPP-RA, Pham & Pham,
IEEE Trans. Robotics 2018) -- a backward pass computes at every sample the largest
``x`` from which the base can still stop where it must, and a forward pass takes the
largest admissible acceleration that stays inside those sets.  It is the discrete
form of the phase-plane method of Bobrow, Dubowsky & Gibson (1985) and Shin & McKay
(1985): accelerate as hard as allowed, brake as late as possible.  Here every
constraint is one number per wheel, so each stage is solved in closed form.
``u`` is constant between samples (``x`` linear in ``s``), so the time across an
interval of length ``ds`` is exactly ``2 ds / (v_j + v_j+1)``.

Where the path demands it the base stops: at sharp corners (the direction of travel
jumps), and for bases with steered wheels wherever a steering angle must jump (a
straight meeting an arc on a car-like base, a new heading rate on a four-module
base).  There it re-steers (each wheel at ``max_steer_rate``, the slowest sets the
time) and, for ``line`` bases at a corner, turns in place: a trapezoidal profile in
omega under the wheels' ``max_spin`` and ``max_spin_accel`` (``delta / w + w / a``,
or ``2 sqrt(delta / a)`` when it cannot reach ``w``; kinematics of a trapezoidal
profile, common practice).  At a joint where only the curvature (or the heading rate)
changes, a base without steered wheels keeps its speed and its wheel speeds step
there; the engine ramps them within ``max_spin_accel`` and the tracking controller
takes up the brief lag.

The result (:class:`Plan`) also holds the whole motion against time (body-origin
poses, the unit twist of the motion that comes next, phases), which the tracking
controllers of :mod:`sim.engine.tracking` follow.  Units: m, s, rad throughout.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from sim.model.robot import Robot
from sim.model.route import Route, wrap_turn
from sim.theory.analysis import analyze
from sim.theory.constraints import contact_velocity, rolling_rows
from sim.theory.kinematics import STILL, admissible_basis, choose_angle

DEFAULT_DS = 0.005          # m, sample spacing (finer on short routes, see default_ds)
STEER_JUMP = 1e-4           # rad: a steering angle changing more than this at a joint needs a stop
PHASE_DRIVE, PHASE_TURN, PHASE_RESTEER = 0, 1, 2
_EPS_J = 1e-9               # rad/s per m/s: a wheel this slow per unit speed counts as still
_TURN_SAMPLES = 0.01        # s, spacing of samples through an in-place turn


def default_ds(route: Route) -> float:
    """m: 5 mm, or finer on routes shorter than 10 m (at least 2000 samples, not below 1 mm)."""
    return max(1e-3, min(DEFAULT_DS, route.length / 2000.0))


@dataclass(frozen=True)
class Motion:
    """How a base follows routes (module docstring).

    kind : ``free`` | ``line`` | ``none``.  steered : has steered wheels.  guide :
    (gx, gy, phi): the tracked body point (m) and the direction (rad, body frame) it
    moves in (``line``; (0, 0, 0) otherwise).  law : the tracking law,
    ``omni`` | ``steered`` | ``kanayama`` (see :mod:`sim.engine.tracking`).  kind_text :
    the class from :func:`sim.theory.analysis.analyze`.  reason : why ``none``.
    """

    kind: str
    steered: bool
    guide: tuple
    law: str
    kind_text: str
    reason: str | None = None


def motion_of(robot: Robot) -> Motion:
    """How ``robot`` follows routes, from its admissible twists and its analysis."""
    a = robot.arrays
    rep = analyze(robot)
    steered = bool(np.any(a.is_("steered")))
    if not np.any(a.driven):
        return Motion("none", steered, (0.0, 0.0, 0.0), "none", rep.kind, "no wheel is driven")
    k = admissible_basis(robot).shape[1]
    if k == 3:
        return Motion("free", steered, (0.0, 0.0, 0.0), "steered" if steered else "omni", rep.kind)
    if k == 2 and rep.icr.get("kind") == "line":
        ln = rep.icr["line"]
        na, nb, c = ln["a"], ln["b"], ln["c"]
        n = math.hypot(na, nb)
        na, nb, c = na / n, nb / n, c / n
        # the point of the line a x + b y = c nearest the origin; it moves along the normal (a, b)
        return Motion("line", steered, (c * na + 0.0, c * nb + 0.0, math.atan2(nb, na)), "kanayama", rep.kind)
    why = ("its fixed wheels' axles do not meet, so it cannot move without skidding" if k == 0 else
           "its fixed wheels allow only one motion (parallel axles: skid steering needs wheel commands)")
    return Motion("none", steered, (0.0, 0.0, 0.0), "none", rep.kind, why)


@dataclass(eq=False)
class Plan:
    """A base's fastest drive along a route.

    robot : name.  motion : :class:`Motion`.  feasible : bool; reason : why not (None
    when feasible); waypoint : the waypoint the reason is about, or None.
    time : s, total = drive_time + turn_time + resteer_time (nan when infeasible).
    peak_spin : wheel name -> rad/s, largest |spin| over the plan.
    legs : one dict per leg (``leg``, ``length`` m, ``time`` s driving, ``limit``: the
    constraint that binds longest on it).  stops : one dict per stop (``waypoint``,
    ``turn`` rad, ``turn_time`` s, ``resteer_time`` s, ``limit``).

    The motion against time, shapes (M,): ``t`` s (non-decreasing), ``pose`` (M, 3)
    the body origin's reference pose (theta continuous), ``hint`` (M, 3) the body twist
    per unit speed of the motion under way or next (0 once the route is done),
    ``phase`` (PHASE_DRIVE / PHASE_TURN / PHASE_RESTEER), ``speed`` path speed m/s
    (rad/s in turns), ``index`` the path sample each row is at.  ``path`` is the sampled
    route (:class:`sim.model.route.PathSamples`), ``profile`` the path speed (m/s) at
    each path sample.
    """

    robot: str
    motion: Motion
    feasible: bool
    reason: str | None = None
    waypoint: int | None = None
    time: float = math.nan
    drive_time: float = 0.0
    turn_time: float = 0.0
    resteer_time: float = 0.0
    peak_spin: dict = field(default_factory=dict)
    legs: list = field(default_factory=list)
    stops: list = field(default_factory=list)
    t: np.ndarray | None = None
    pose: np.ndarray | None = None
    hint: np.ndarray | None = None
    phase: np.ndarray | None = None
    speed: np.ndarray | None = None
    index: np.ndarray | None = None
    path: object = None
    profile: np.ndarray | None = None
    min_radius: float | None = None

    @property
    def start_pose(self) -> np.ndarray:
        return self.pose[0]

    @property
    def end_pose(self) -> np.ndarray:
        return self.pose[-1]

    def as_dict(self) -> dict:
        """JSON-ready summary (no arrays)."""
        f = lambda v: None if v is None or not math.isfinite(v) else round(float(v), 6)
        return {"robot": self.robot, "feasible": self.feasible, "time": f(self.time),
                "drive_time": f(self.drive_time) if self.feasible else None,
                "turn_time": f(self.turn_time) if self.feasible else None,
                "resteer_time": f(self.resteer_time) if self.feasible else None,
                "reason": self.reason, "waypoint": self.waypoint, "class": self.motion.kind_text,
                "follows": self.motion.kind, "law": self.motion.law,
                "peak_spin": {k: f(v) for k, v in self.peak_spin.items()},
                "legs": [{k: (f(v) if isinstance(v, float) else v) for k, v in leg.items()} for leg in self.legs],
                "stops": [{k: (f(v) if isinstance(v, float) else v) for k, v in s.items()} for s in self.stops]}


class _Infeasible(Exception):
    def __init__(self, reason, waypoint=None):
        super().__init__(reason)
        self.reason, self.waypoint = reason, waypoint


def wrap_pi(a):
    """Angles (array) wrapped to [-pi/2, pi/2): the same wheel axis modulo a half turn."""
    return (np.asarray(a, dtype=float) + math.pi / 2) % math.pi - math.pi / 2


def trapezoid_time(delta: float, rate: float, accel: float) -> float:
    """s to turn through ``delta`` >= 0 from rest to rest, at most ``rate`` and ``accel``
    (kinematics of a trapezoidal profile, common practice)."""
    if delta <= 0:
        return 0.0
    if math.isinf(accel):
        return delta / rate
    if math.isinf(rate) or delta < rate * rate / accel:
        return 2.0 * math.sqrt(delta / accel)
    return delta / rate + rate / accel


def _trapezoid_rate(t, delta, rate, accel):
    """Rate (rad/s, >= 0) of the profile of :func:`trapezoid_time` after t s; t (k,)."""
    T = trapezoid_time(delta, rate, accel)
    t = np.asarray(t, dtype=float)
    if math.isinf(accel):
        return np.where((t >= 0) & (t <= T), delta / T if T > 0 else 0.0, 0.0)
    peak = min(rate, math.sqrt(delta * accel))
    return np.clip(np.minimum(accel * t, accel * (T - t)), 0.0, peak)


def _trapezoid_angle(t, delta, rate, accel):
    """Angle (rad) turned after t s of the profile of :func:`trapezoid_time`; t (k,)."""
    T = trapezoid_time(delta, rate, accel)
    t = np.clip(np.asarray(t, dtype=float), 0.0, T)
    if math.isinf(accel):
        return delta * t / T if T > 0 else np.full_like(t, delta)
    peak = min(rate, math.sqrt(delta * accel))
    ta = peak / accel
    up = 0.5 * accel * np.minimum(t, ta) ** 2
    cruise = peak * np.clip(t - ta, 0.0, max(T - 2 * ta, 0.0))
    td = np.maximum(t - (T - ta), 0.0)
    down = peak * td - 0.5 * accel * td ** 2
    return np.minimum(up + cruise + down, delta)


class _Wheels:
    """Per-unit-speed wheel quantities for a batch of body twists ``xi`` (m, 3) and their
    path derivatives ``dxi`` (m, 3)."""

    def __init__(self, robot: Robot, xi, dxi):
        a = robot.arrays
        self.robot = robot
        st = a.is_("steered")
        roll = a.driven & (a.is_("fixed") | a.is_("swedish"))
        self.roll = np.flatnonzero(roll)
        self.st = np.flatnonzero(st)
        self.st_driven = np.flatnonzero(st & a.driven)
        rows = rolling_rows(a.x[self.roll], a.y[self.roll], a.heading[self.roll], a.roller[self.roll])
        k = a.radius[self.roll] * np.cos(a.roller[self.roll])
        J_roll = (xi @ rows.T) / k
        dJ_roll = (dxi @ rows.T) / k
        u = contact_velocity(a.x[self.st], a.y[self.st], xi[:, None, :])       # (m, ns, 2)
        du = contact_velocity(a.x[self.st], a.y[self.st], dxi[:, None, :])
        sp = np.hypot(u[..., 0], u[..., 1])
        self.moving = sp > STILL
        safe = np.where(self.moving, sp, 1.0)
        self.beta_raw = np.arctan2(u[..., 1], u[..., 0])
        self.dbeta = np.where(self.moving, (u[..., 0] * du[..., 1] - u[..., 1] * du[..., 0]) / safe ** 2, 0.0)
        r = a.radius[self.st]
        J_st = sp / r
        dJ_st = np.where(self.moving, (u[..., 0] * du[..., 0] + u[..., 1] * du[..., 1]) / safe, 0.0) / r
        drv = np.isin(self.st, self.st_driven)
        # driven wheels: rolling ones then driven steered ones
        self.idx = np.concatenate([self.roll, self.st[drv]])
        self.J = np.hstack([J_roll, J_st[:, drv]])
        self.dJ = np.hstack([dJ_roll, dJ_st[:, drv]])


def _steer_targets(robot, xi):
    """Angles (ns,) a steered wheel takes for twist ``xi`` (3,) (nan when its contact is still)."""
    a = robot.arrays
    st = np.flatnonzero(a.is_("steered"))
    u = contact_velocity(a.x[st], a.y[st], np.asarray(xi, dtype=float))
    sp = np.hypot(u[:, 0], u[:, 1])
    return np.where(sp > STILL, np.arctan2(u[:, 1], u[:, 0]), np.nan)


def _choose(robot, raw, current, where_text, waypoint):
    """Steering angles (ns,) for raw directions ``raw`` from ``current``: nearer of the
    angle and its opposite within the limits (held where raw is nan)."""
    a = robot.arrays
    st = np.flatnonzero(a.is_("steered"))
    out = current.copy()
    for j, i in enumerate(st):
        if not math.isfinite(raw[j]):
            continue
        v, _ = choose_angle(float(raw[j]), float(current[j]), float(a.steer_lo[i]), float(a.steer_hi[i]))
        v = float(v)
        if not a.steer_lo[i] - 1e-9 <= v <= a.steer_hi[i] + 1e-9:
            w = robot.wheels[i]
            raise _Infeasible(f"{where_text}: {w.name} would have to point at {math.degrees(wrap_turn(raw[j])):.1f} "
                              f"deg (or opposite), outside its steer_limits "
                              f"[{math.degrees(w.steer_limits[0]):.0f}, {math.degrees(w.steer_limits[1]):.0f}] deg",
                              waypoint)
        out[j] = v
    return out


def _resteer_time(robot, frm, to):
    """(s, wheel name or None): time to turn steered wheels from ``frm`` to ``to`` (ns,)."""
    a = robot.arrays
    st = np.flatnonzero(a.is_("steered"))
    if not len(st):
        return 0.0, None
    t = np.abs(to - frm) / a.max_steer_rate[st]
    t = np.where(np.abs(to - frm) > 0, t, 0.0)
    j = int(np.argmax(t))
    return float(t[j]), (robot.wheels[st[j]].name if t[j] > 0 else None)


def min_turn_radius(robot: Robot, motion: Motion) -> float:
    """m: the tightest path radius a ``line`` base's steered wheels allow (0 without
    steered wheels; inf when it can only go straight).  Found by bisection on the
    curvature (both senses), each steered wheel's angle checked against its limits."""
    a = robot.arrays
    st = np.flatnonzero(a.is_("steered"))
    if motion.kind != "line" or not len(st):
        return 0.0
    gx, gy, phi = motion.guide

    def ok(k):
        xi = np.array([math.cos(phi) + k * gy, math.sin(phi) - k * gx, k])
        raw = _steer_targets(robot, xi)
        for j, i in enumerate(st):
            if not math.isfinite(raw[j]):
                continue
            c = raw[j] + math.pi * np.arange(-3, 4)
            if not np.any((c >= a.steer_lo[i] - 1e-12) & (c <= a.steer_hi[i] + 1e-12)):
                return False
        return True

    best = math.inf
    for sign in (1.0, -1.0):
        if ok(sign * 1e6):
            best = min(best, 0.0)
            continue
        lo, hi = 0.0, 1e6
        if not ok(0.0):
            continue
        for _ in range(200):
            mid = 0.5 * (lo + hi) if hi < 1e3 else math.sqrt(max(lo, 1e-9) * hi)
            if ok(sign * mid):
                lo = mid
            else:
                hi = mid
            if hi - lo <= 1e-13 * hi:
                break
        best = min(best, 1.0 / lo if lo > 0 else math.inf)
    return best


# ---------------------------------------------------------------------------------------
def with_headroom(robot: Robot, headroom: float) -> Robot:
    """``robot`` with ``max_spin``, ``max_spin_accel`` and ``max_steer_rate`` scaled by
    ``1 - headroom``: a plan inside these leaves the rest to the tracking feedback."""
    if not headroom:
        return robot
    from dataclasses import replace

    f = 1.0 - headroom
    return replace(robot, wheels=tuple(replace(w, max_spin=w.max_spin * f, max_spin_accel=w.max_spin_accel * f,
                                               max_steer_rate=w.max_steer_rate * f) for w in robot.wheels))


def plan_route(robot: Robot, route: Route, ds: float | None = None, steer=None,
               start_heading: float | None = None, headroom: float = 0.0) -> Plan:
    """The fastest drive of ``robot`` along ``route`` from rest to rest (module docstring).

    ds : m, sample spacing (default :func:`default_ds`).  steer : (n,) rad, steering
    angles at the start (default: the robot file's).  start_heading : rad, the heading
    at the first waypoint when the route gives none (default: along the first leg).
    headroom : fraction of every actuator limit kept back (:func:`with_headroom`).
    An infeasible route gives a Plan with ``feasible`` False and the reason.
    """
    robot = with_headroom(robot, headroom)
    motion = motion_of(robot)
    if motion.kind == "none":
        return Plan(robot.name, motion, False, f"{robot.name} cannot follow a route: {motion.reason}")
    try:
        return _plan(robot, route, motion, ds or default_ds(route), steer, start_heading)
    except _Infeasible as exc:
        p = Plan(robot.name, motion, False, exc.reason, exc.waypoint)
        p.min_radius = min_turn_radius(robot, motion) if motion.kind == "line" else None
        return p


def _headings(route, samples, motion, start_heading):
    """Body heading theta (m,) and its path derivative (m,) at every sample."""
    psi, kappa, leg = samples.tangent, samples.curvature, samples.leg
    if motion.kind == "line":
        return psi - motion.guide[2], kappa.copy()
    h0 = route.headings[0]
    if h0 is None:
        h0 = start_heading if start_heading is not None else float(psi[0])
    ks, kh = [float(samples.waypoint_s[0])], [float(h0)]
    for i in range(1, len(route.waypoints)):
        h = route.headings[i]
        if h is None:
            continue
        kh.append(kh[-1] + wrap_turn(h - kh[-1]))
        ks.append(float(samples.waypoint_s[i]))
    theta = np.interp(samples.s, ks, kh)
    # slope per leg: knots sit at waypoints, which begin legs
    nlegs = len(route.waypoints) - 1
    slope_leg = np.zeros(nlegs)
    for i in range(nlegs):
        s0, s1 = samples.waypoint_s[i], samples.waypoint_s[i + 1]
        if s1 > s0:
            slope_leg[i] = (np.interp(s1, ks, kh) - np.interp(s0, ks, kh)) / (s1 - s0)
    return theta, slope_leg[leg]


def _unit_twists(samples, motion, theta, dtheta):
    """xi (m, 3) body twist per unit path speed and d xi / ds (m, 3)."""
    psi, kappa = samples.tangent, samples.curvature
    m = len(psi)
    if motion.kind == "line":
        gx, gy, phi = motion.guide
        xi = np.stack([math.cos(phi) + kappa * gy, math.sin(phi) - kappa * gx, kappa], axis=1)
        return xi, np.zeros((m, 3))
    rel = psi - theta
    xi = np.stack([np.cos(rel), np.sin(rel), dtheta], axis=1)
    f = kappa - dtheta
    dxi = np.stack([-f * np.sin(rel), f * np.cos(rel), np.zeros(m)], axis=1)
    return xi, dxi


def _plan(robot, route, motion, ds, steer, start_heading) -> Plan:
    a = robot.arrays
    names = [w.name for w in robot.wheels]
    S = route.sample(ds)
    m = len(S)
    theta, dtheta = _headings(route, S, motion, start_heading)
    xi, dxi = _unit_twists(S, motion, theta, dtheta)
    W = _Wheels(robot, xi, dxi)
    st = W.st
    gx, gy, phi = motion.guide
    min_r = min_turn_radius(robot, motion) if motion.kind == "line" else None

    # -- where the base must stop ----------------------------------------------------
    stop_after = set(int(j) for j in np.flatnonzero(S.turn != 0.0))
    if len(st):
        for j in np.flatnonzero(S.joint):
            both = W.moving[j] & W.moving[j + 1]
            if np.any(np.abs(wrap_pi(W.beta_raw[j + 1] - W.beta_raw[j]))[both] > STEER_JUMP):
                stop_after.add(int(j))
    cuts = sorted(stop_after)
    segments = []
    lo_i = 0
    for j in cuts:
        segments.append((lo_i, j))
        lo_i = j + 1
    segments.append((lo_i, m - 1))

    def wp_at(j):
        """The waypoint at sample j (a segment end), for messages."""
        return int(np.argmin(np.abs(S.waypoint_s - S.s[j])))

    # -- headings a `line` base is asked to hold --------------------------------------
    turn_start = turn_end = 0.0
    if motion.kind == "line":
        h0 = route.headings[0] if route.headings[0] is not None else start_heading
        if h0 is not None:
            turn_start = wrap_turn(theta[0] - h0)
        if route.headings[-1] is not None:
            turn_end = wrap_turn(route.headings[-1] - theta[-1])
        r = route.corner_radius
        for i in range(1, len(route.waypoints) - 1):
            h = route.headings[i]
            if h is None:
                continue
            turn_i = wrap_turn(math.atan2(*(route.waypoints[i + 1] - route.waypoints[i])[::-1])
                               - math.atan2(*(route.waypoints[i] - route.waypoints[i - 1])[::-1]))
            near = np.abs(S.s - S.waypoint_s[i]) <= r * abs(turn_i) / 2 + 1e-9
            lo_h, hi_h = float(np.min(theta[near])), float(np.max(theta[near]))
            off = (h - lo_h) % (2 * math.pi)
            tol = math.radians(0.5)
            if not (off <= hi_h - lo_h + tol or off >= 2 * math.pi - tol):
                raise _Infeasible(f"waypoint {i} asks for heading {math.degrees(h):.1f} deg, but {robot.name} "
                                  f"faces along its path there ({math.degrees(wrap_turn(lo_h)):.1f} to "
                                  f"{math.degrees(wrap_turn(hi_h)):.1f} deg): a heading it cannot hold while "
                                  "moving along the path", i)

    turn_xi = np.array([gy, -gx, 1.0])
    turn_J = None
    if motion.kind == "line" and (turn_start or turn_end or any(S.turn != 0.0)):
        turn_J = _Wheels(robot, turn_xi[None, :], np.zeros((1, 3)))
        raw = _steer_targets(robot, turn_xi)
        lim = []
        for j, i in enumerate(st):
            if not math.isfinite(raw[j]):
                continue
            c = raw[j] + math.pi * np.arange(-3, 4)
            if not np.any((c >= a.steer_lo[i] - 1e-9) & (c <= a.steer_hi[i] + 1e-9)):
                lim.append(f"{names[i]} would have to point at {math.degrees(wrap_turn(raw[j])):.1f} deg "
                           f"(or opposite), outside its steer_limits "
                           f"[{math.degrees(a.steer_lo[i]):.0f}, {math.degrees(a.steer_hi[i]):.0f}] deg")
        if lim:
            if any(S.turn != 0.0):
                j = int(np.flatnonzero(S.turn != 0.0)[0])
                wp = wp_at(j)
                what = f"the sharp corner at waypoint {wp} (turn {math.degrees(S.turn[j]):.0f} deg)"
            else:
                wp = 0 if turn_start else len(route.waypoints) - 1
                what = f"the heading asked at waypoint {wp}"
            radius = (f"; round the corners with corner_radius >= {min_r:.3f} m, its minimum turning radius"
                      if min_r is not None and math.isfinite(min_r) and min_r > 0 else "")
            raise _Infeasible(f"{what} needs a turn in place, and {robot.name} cannot turn in place: "
                              f"{lim[0]}{radius}", wp)

    # -- arcs tighter than a steered `line` base can follow -----------------------------
    if min_r is not None and min_r > 0:
        tight = np.flatnonzero(np.abs(S.curvature) * min_r > 1.0 + 1e-9)
        if len(tight):
            j = int(tight[0])
            raise _Infeasible(f"the arc of radius {1 / abs(S.curvature[j]):.3f} m near waypoint {wp_at(j)} is tighter "
                              f"than {robot.name} can steer: its minimum turning radius is {min_r:.3f} m "
                              "(its steered wheels' steer_limits)", wp_at(j))

    # -- steering along each segment -------------------------------------------------
    cur = (np.asarray(steer, dtype=float) if steer is not None else a.heading.copy())[st]
    beta = np.zeros((m, len(st)))
    events = []          # (before segment index) lists of ("resteer", t, wheel, hint) / ("turn", delta)
    for sidx, (i0, i1) in enumerate(segments):
        ev = []
        if motion.kind == "line":
            delta = turn_start if sidx == 0 else float(S.turn[i0 - 1])
            if delta:
                wp = 0 if sidx == 0 else wp_at(i0 - 1)
                tgt = _choose(robot, _steer_targets(robot, turn_xi * math.copysign(1.0, delta)), cur,
                              f"turning in place at waypoint {wp}", wp)
                ev.append(("resteer", *_resteer_time(robot, cur, tgt), turn_xi * math.copysign(1.0, delta), wp))
                cur = tgt
                ev.append(("turn", delta, wp))
        if len(st):
            raw = W.beta_raw[i0:i1 + 1].copy()
            mov = W.moving[i0:i1 + 1]
            # carry the last defined direction over samples where a contact is still
            for j in range(len(st)):
                col, mv = raw[:, j], mov[:, j]
                if not mv.any():
                    raw[:, j] = np.nan
                    continue
                first = int(np.argmax(mv))
                col[:first] = col[first]
                idx = np.where(mv, np.arange(len(col)), 0)
                np.maximum.accumulate(idx, out=idx)
                raw[:, j] = col[idx]
            wp = wp_at(i0)
            where = f"leaving waypoint {wp}" if i0 > 0 or sidx > 0 else "at the start"
            start = _choose(robot, raw[0], cur, f"{where}", wp)
            steps = np.nan_to_num(wrap_pi(np.diff(raw, axis=0)))
            seg_beta = start[None, :] + np.vstack([np.zeros((1, len(st))), np.cumsum(steps, axis=0)])
            seg_beta = _fit_limits(robot, seg_beta, cur, S, i0, wp_at, min_r)
            ev.append(("resteer", *_resteer_time(robot, cur, seg_beta[0]), xi[i0], wp))
            beta[i0:i1 + 1] = seg_beta
            cur = seg_beta[-1]
        events.append(ev)
    tail = []
    if motion.kind == "line" and turn_end:
        wp = len(route.waypoints) - 1
        tgt = _choose(robot, _steer_targets(robot, turn_xi * math.copysign(1.0, turn_end)), cur,
                      f"turning in place at waypoint {wp}", wp)
        tail.append(("resteer", *_resteer_time(robot, cur, tgt), turn_xi * math.copysign(1.0, turn_end), wp))
        tail.append(("turn", turn_end, wp))

    # -- velocity limits and the speed profile ---------------------------------------
    M, names_X = _velocity_limits(robot, route, W, S)
    X = np.min(M, axis=1)
    x = np.zeros(m)
    for (i0, i1) in segments:
        x[i0:i1 + 1] = _topp(S.s[i0:i1 + 1], X[i0:i1 + 1], W.J[i0:i1 + 1], W.dJ[i0:i1 + 1],
                             a.max_spin_accel[W.idx])
    if not np.all(np.isfinite(x)):
        raise _Infeasible(f"nothing limits {robot.name}'s speed: give its driven wheels max_spin "
                          "(and max_spin_accel) or the route a speed")
    v = np.sqrt(x)
    dsv = np.diff(S.s)
    vs = v[:-1] + v[1:]
    if np.any((dsv > 0) & (vs <= 0)):
        j = int(np.flatnonzero((dsv > 0) & (vs <= 0))[0])
        raise _Infeasible(f"{robot.name} cannot move at ({S.xy[j, 0]:.3f}, {S.xy[j, 1]:.3f}) m: "
                          f"{names_X[int(np.argmin(M[j]))]} allows no speed there",
                          wp_at(j))
    dt = np.where(dsv > 0, 2 * dsv / np.where(vs > 0, vs, 1.0), 0.0)

    # -- what limits each interval -------------------------------------------------------
    limit_names = _interval_limits(robot, W, S, x, M, names_X)

    # -- assemble the motion against time ----------------------------------------------------
    plan = Plan(robot.name, motion, True, min_radius=min_r)
    T = _Timeline(motion)
    first = [ev for ev in events[0] if ev[0] == "resteer"]
    T.rest(S.xy[0], theta[0] - turn_start, 0, first[0][3] if first else xi[0])
    peak = np.zeros(len(W.idx))
    totals = {"turn": 0.0, "resteer": 0.0}
    stops = []
    legs = {}

    def stop_at(evs):
        """Carry out the stop events ``evs``; returns the stop's summary or None."""
        nonlocal peak
        stop = None
        for ev in evs:
            if ev[0] == "resteer":
                _, dur, wheel, hint, wp = ev
                if dur <= 0:
                    continue
                T.wait(dur, hint)
                totals["resteer"] += dur
                what = f"re-steer: {wheel} max_steer_rate"
            else:
                _, delta, wp = ev
                dur, what, wpk = _turn(robot, turn_J, names, delta)
                peak = np.maximum(peak, wpk)
                T.turn(delta, dur, turn_xi, _turn_limits(turn_J, a))
                totals["turn"] += dur
            stop = stop or {"waypoint": wp, "turn": 0.0, "turn_time": 0.0, "resteer_time": 0.0, "limit": ""}
            if ev[0] == "resteer":
                stop["resteer_time"] += dur
            else:
                stop["turn"] += delta
                stop["turn_time"] += dur
            stop["limit"] = (stop["limit"] + "; " if stop["limit"] else "") + what
        return stop

    for sidx, (i0, i1) in enumerate(segments):
        stop = stop_at(events[sidx])
        if stop is not None:
            stops.append(stop)
        elif sidx > 0:
            stops.append({"waypoint": wp_at(i0), "turn": 0.0, "turn_time": 0.0, "resteer_time": 0.0,
                          "limit": "stop (the direction of travel jumps)"})
        T.drive(S, theta, xi, v, dt, i0, i1)
        peak = np.maximum(peak, np.max(np.abs(W.J[i0:i1 + 1]) * v[i0:i1 + 1, None], axis=0))
        for j in range(i0, i1):
            if dt[j] <= 0:
                continue
            L = legs.setdefault(int(S.leg[j]), {"time": 0.0, "length": 0.0, "by": {}})
            L["time"] += dt[j]
            L["length"] += dsv[j]
            L["by"][limit_names[j]] = L["by"].get(limit_names[j], 0.0) + dt[j]
    stop = stop_at(tail)
    if stop is not None:
        stops.append(stop)
    turn_time, resteer_time = totals["turn"], totals["resteer"]
    T.finish()
    plan.t, plan.pose, plan.hint, plan.phase, plan.speed, plan.index = T.arrays()
    plan.path, plan.profile = S, v
    plan.drive_time = float(np.sum(dt))
    plan.turn_time, plan.resteer_time = float(turn_time), float(resteer_time)
    plan.time = plan.drive_time + plan.turn_time + plan.resteer_time
    plan.peak_spin = {names[i]: float(p) for i, p in zip(W.idx, peak)}
    plan.stops = stops
    for k in sorted(legs):
        L = legs[k]
        lim = max(L["by"].items(), key=lambda kv: kv[1])[0] if L["by"] else ""
        plan.legs.append({"leg": k, "from": k, "to": k + 1, "length": float(L["length"]),
                          "time": float(L["time"]), "limit": lim})
    return plan


def _fit_limits(robot, seg_beta, cur, S, i0, wp_at, min_r):
    """The segment's angles (m_seg, ns), shifted by a half turn where that keeps a wheel within
    its limits; _Infeasible when neither fits."""
    a = robot.arrays
    st = np.flatnonzero(a.is_("steered"))
    out = seg_beta.copy()
    for j, i in enumerate(st):
        lo, hi = a.steer_lo[i] - 1e-9, a.steer_hi[i] + 1e-9
        best = None
        for k in (0, -1, 1, -2, 2):
            c = seg_beta[:, j] + k * math.pi
            if np.all((c >= lo) & (c <= hi)):
                cost = abs(c[0] - cur[j])
                if best is None or cost < best[0] - 1e-12:
                    best = (cost, c)
        if best is None:
            bad = int(np.flatnonzero((seg_beta[:, j] < lo) | (seg_beta[:, j] > hi))[0])
            jj = i0 + bad
            w = robot.wheels[i]
            kappa = S.curvature[jj]
            where = (f"the arc of radius {1 / abs(kappa):.3f} m near waypoint {wp_at(jj)}" if kappa
                     else f"leg {S.leg[jj]}")
            extra = (f" ({robot.name}'s minimum turning radius is {min_r:.3f} m)"
                     if min_r is not None and math.isfinite(min_r) and min_r > 0 else "")
            raise _Infeasible(f"{where} is tighter than {robot.name} can steer: {w.name} would have to point "
                              f"at {math.degrees(wrap_turn(seg_beta[bad, j])):.1f} deg, outside its steer_limits "
                              f"[{math.degrees(w.steer_limits[0]):.0f}, {math.degrees(w.steer_limits[1]):.0f}] deg"
                              f"{extra}", wp_at(jj))
        out[:, j] = best[1]
    return out


def _velocity_limits(robot, route, W, S):
    """(M, names): the largest x = v^2 each constraint allows at each sample, M (m, c), and the
    constraints' names (c,)."""
    a = robot.arrays
    names = [w.name for w in robot.wheels]
    m = len(S)
    cols, labels = [], []
    absJ = np.abs(W.J)
    for k, i in enumerate(W.idx):
        if math.isfinite(a.max_spin[i]):
            with np.errstate(divide="ignore"):
                cols.append(np.where(absJ[:, k] > _EPS_J, (a.max_spin[i] / np.maximum(absJ[:, k], _EPS_J)) ** 2,
                                     np.inf))
            labels.append(f"{names[i]} max_spin")
    for k, i in enumerate(W.st):
        if math.isfinite(a.max_steer_rate[i]):
            d = np.abs(W.dbeta[:, k])
            cols.append(np.where(d > 1e-12, (a.max_steer_rate[i] / np.maximum(d, 1e-12)) ** 2, np.inf))
            labels.append(f"{names[i]} max_steer_rate")
    if math.isfinite(route.speed):
        cols.append(np.full(m, route.speed ** 2))
        labels.append("route speed")
    # acceleration limits that bind through the path's shape alone (J' x)
    alpha = a.max_spin_accel[W.idx]
    fin = np.isfinite(alpha)
    if np.any(fin):
        J, dJ = W.J[:, fin], W.dJ[:, fin]
        al = alpha[fin]
        wn = [names[i] for i in W.idx[fin]]
        live = np.abs(J) > _EPS_J
        q = np.where(live, dJ / np.where(live, J, 1.0), 0.0)
        w = np.where(live, al / np.where(live, np.abs(J), 1.0), np.inf)
        for k in range(J.shape[1]):
            # a wheel at rest per unit speed: |J' x| <= alpha
            dd = np.abs(dJ[:, k])
            cols.append(np.where(~live[:, k] & (dd > 1e-12), al[k] / np.maximum(dd, 1e-12), np.inf))
            labels.append(f"{wn[k]} max_spin_accel")
            for l in range(J.shape[1]):
                if l == k:
                    continue
                diff = q[:, l] - q[:, k]
                ok = live[:, k] & live[:, l] & (diff > 1e-12)
                cols.append(np.where(ok, (w[:, k] + w[:, l]) / np.where(ok, diff, 1.0), np.inf))
                labels.append(f"{wn[k]} max_spin_accel")
    if not cols:
        cols.append(np.full(m, np.inf))
        labels.append("nothing")
    return np.stack(cols, axis=1), labels


def _topp(s, X, J, dJ, alpha):
    """x = v^2 (m_seg,) along one segment from rest to rest, time-optimal (module docstring).

    s (m_seg,) m; X (m_seg,) velocity-squared limits; J, dJ (m_seg, n) spins per unit speed
    and their path derivatives; alpha (n,) max_spin_accel (inf: none).
    """
    m = len(s)
    if m == 1:
        return np.zeros(1)
    ds = np.diff(s)
    live = (np.abs(J) > _EPS_J) & np.isfinite(alpha)[None, :]
    absJ = np.where(live, np.abs(J), 1.0)
    q = np.where(live, dJ / np.where(live, J, 1.0), 0.0)
    w = np.where(live, np.broadcast_to(alpha, J.shape) / absJ, np.inf)
    qs, ws, lv = q.tolist(), w.tolist(), live.tolist()
    Xl, dsl = X.tolist(), ds.tolist()
    K = [0.0] * m
    K[m - 1] = 0.0
    for j in range(m - 2, -1, -1):
        d = dsl[j]
        k1 = K[j + 1]
        if d == 0.0:
            K[j] = min(Xl[j], k1)
            continue
        best = Xl[j]
        for qi, wi, li in zip(qs[j], ws[j], lv[j]):
            if not li:
                continue
            c = 1.0 - 2.0 * d * qi
            if c > 0.0:
                b = (k1 + 2.0 * d * wi) / c
            elif c < 0.0:
                b = 2.0 * d * wi / -c
            else:
                continue
            if b < best:
                best = b
        K[j] = best if best > 0.0 else 0.0
    if not all(math.isfinite(k) for k in K):
        return np.full(m, np.inf)
    x = [0.0] * m
    for j in range(m - 1):
        d = dsl[j]
        xj = x[j]
        if d == 0.0:
            x[j + 1] = min(xj, K[j + 1])
            continue
        hi = math.inf
        for qi, wi, li in zip(qs[j], ws[j], lv[j]):
            if li:
                h = wi - qi * xj
                if h < hi:
                    hi = h
        reach = (K[j + 1] - xj) / (2.0 * d) if math.isfinite(K[j + 1]) else math.inf
        u = min(hi, reach)
        nx = xj + 2.0 * d * u if math.isfinite(u) else math.inf
        x[j + 1] = min(max(nx, 0.0), K[j + 1])
    x[m - 1] = 0.0
    return np.array(x)


def _interval_limits(robot, W, S, x, M, names_X):
    """Name of the constraint that binds over each interval j -> j+1 (m - 1,); ``M`` from
    :func:`_velocity_limits`."""
    a = robot.arrays
    names = [w.name for w in robot.wheels]
    X = np.min(M, axis=1)
    which = np.argmin(M, axis=1)
    out = []
    alpha = a.max_spin_accel[W.idx]
    for j in range(len(x) - 1):
        if x[j] >= X[j] * (1 - 1e-6) or x[j + 1] >= X[j + 1] * (1 - 1e-6):
            k = j if x[j] >= X[j] * (1 - 1e-6) else j + 1
            out.append(names_X[which[k]])
            continue
        # accelerating or braking: the wheel whose max_spin_accel binds
        J, dJ = W.J[j], W.dJ[j]
        need = np.abs(dJ * x[j] + J * (x[j + 1] - x[j]) / (2 * max(S.s[j + 1] - S.s[j], 1e-300)))
        ratio = np.where(np.isfinite(alpha), need / alpha, 0.0)
        out.append(f"{names[W.idx[int(np.argmax(ratio))]]} max_spin_accel" if ratio.size and ratio.max() > 0
                   else "stop")
    return out


def _turn_limits(turn_J, a):
    """(rate rad/s, accel rad/s^2) of an in-place turn."""
    J = np.abs(turn_J.J[0])
    live = J > _EPS_J
    if not np.any(live):
        return math.inf, math.inf
    rate = float(np.min(np.where(live, a.max_spin[turn_J.idx] / np.where(live, J, 1.0), np.inf)))
    acc = float(np.min(np.where(live, a.max_spin_accel[turn_J.idx] / np.where(live, J, 1.0), np.inf)))
    return rate, acc


def _turn(robot, turn_J, names, delta):
    """(s, limiting text, peak spins (n_driven,)) of an in-place turn through ``delta`` rad."""
    a = robot.arrays
    rate, acc = _turn_limits(turn_J, a)
    if math.isinf(rate) and math.isinf(acc):
        raise _Infeasible(f"nothing limits {robot.name}'s turns in place: give its driven wheels max_spin")
    dur = trapezoid_time(abs(delta), rate, acc)
    peak_rate = min(rate, math.sqrt(abs(delta) * acc)) if math.isfinite(acc) else rate
    J = np.abs(turn_J.J[0])
    i_rate = int(np.argmax(np.where(J > _EPS_J, J / a.max_spin[turn_J.idx], 0.0)))
    i_acc = int(np.argmax(np.where(J > _EPS_J, J / a.max_spin_accel[turn_J.idx], 0.0)))
    lim = (f"turn: {names[turn_J.idx[i_rate]]} max_spin" if peak_rate >= rate * (1 - 1e-9) else
           f"turn: {names[turn_J.idx[i_acc]]} max_spin_accel")
    return dur, lim, J * peak_rate


class _Timeline:
    """Builds the plan's rows against time (see :class:`Plan`)."""

    def __init__(self, motion):
        self.g = np.array(motion.guide[:2])
        self.t = 0.0
        self.rows = []          # (t (k,), pose (k, 3), hint (k, 3), phase (k,), speed (k,), index (k,))
        self.last = None        # (guide xy (2,), theta, index)

    def _origin(self, gxy, theta):
        theta = np.asarray(theta, dtype=float)
        c, s = np.cos(theta), np.sin(theta)
        return np.stack([gxy[..., 0] - (c * self.g[0] - s * self.g[1]),
                         gxy[..., 1] - (s * self.g[0] + c * self.g[1]), theta], axis=-1)

    def _add(self, t, pose, hint, phase, speed, index):
        k = len(t)
        self.rows.append((np.asarray(t, float), np.asarray(pose, float).reshape(k, 3),
                          np.broadcast_to(np.asarray(hint, float), (k, 3)).copy(), np.full(k, phase, np.int8),
                          np.asarray(speed, float) * np.ones(k), np.full(k, index, np.int64)
                          if np.ndim(index) == 0 else np.asarray(index, np.int64)))

    def rest(self, gxy, theta, j, hint):
        self.last = (np.array(gxy, dtype=float), float(theta), j)
        self._add([self.t], self._origin(self.last[0], theta)[None, :], hint, PHASE_RESTEER, 0.0, j)

    def wait(self, dur, hint):
        g, th, j = self.last
        self.t += dur
        self._add([self.t], self._origin(g, th)[None, :], hint, PHASE_RESTEER, 0.0, j)

    def turn(self, delta, dur, turn_xi, limits):
        g, th, j = self.last
        n = max(2, math.ceil(dur / _TURN_SAMPLES))
        tt = dur * np.arange(1, n + 1) / n
        ang = _trapezoid_angle(tt, abs(delta), *limits) * math.copysign(1.0, delta)
        omega = _trapezoid_rate(tt, abs(delta), *limits)
        self._add(self.t + tt, self._origin(np.broadcast_to(g, (n, 2)), th + ang), turn_xi * math.copysign(1.0, delta),
                  PHASE_TURN, np.abs(omega), j)
        self.t += dur
        self.last = (g, th + delta, j)

    def drive(self, S, theta, xi, v, dt, i0, i1):
        t = self.t + np.concatenate([[0.0], np.cumsum(dt[i0:i1])])
        self._add(t, self._origin(S.xy[i0:i1 + 1], theta[i0:i1 + 1]), xi[i0:i1 + 1], PHASE_DRIVE,
                  v[i0:i1 + 1], np.arange(i0, i1 + 1))
        self.t = float(t[-1])
        self.last = (S.xy[i1].copy(), float(theta[i1]), i1)

    def finish(self):
        g, th, j = self.last
        self._add([self.t], self._origin(g, th)[None, :], np.zeros(3), PHASE_RESTEER, 0.0, j)

    def arrays(self):
        cols = list(zip(*self.rows))
        return tuple(np.concatenate(c) for c in cols)


def plan_turn(robot: Robot, xy, theta_from: float, theta_to: float, steer=None, headroom: float = 0.0) -> Plan:
    """Turning in place about the tracked point at world ``xy`` (m) from ``theta_from`` to
    ``theta_to`` (rad, the shorter way): re-steering, then a trapezoidal turn in omega (see
    :func:`plan_route`).  Infeasible for bases that cannot turn in place."""
    from sim.model.route import PathSamples

    robot = with_headroom(robot, headroom)
    motion = motion_of(robot)
    if motion.kind == "none":
        return Plan(robot.name, motion, False, f"{robot.name} cannot turn: {motion.reason}")
    a = robot.arrays
    names = [w.name for w in robot.wheels]
    gx, gy, _ = motion.guide
    delta = wrap_turn(theta_to - theta_from)
    turn_xi = np.array([gy, -gx, 1.0])
    sgn = math.copysign(1.0, delta)
    st = np.flatnonzero(a.is_("steered"))
    cur = (np.asarray(steer, dtype=float) if steer is not None else a.heading.copy())[st]
    xy = np.asarray(xy, dtype=float)
    path = PathSamples(np.zeros(1), xy.reshape(1, 2), np.array([theta_from]), np.zeros(1), np.zeros(1, int),
                       np.zeros(1, bool), np.zeros(1), np.zeros(2))
    T = _Timeline(motion)
    plan = Plan(robot.name, motion, True)
    try:
        T.rest(xy, theta_from, 0, turn_xi * sgn if delta else np.zeros(3))
        if delta:
            tgt = _choose(robot, _steer_targets(robot, turn_xi * sgn), cur, "turning in place", None)
            dur, wheel = _resteer_time(robot, cur, tgt)
            if dur > 0:
                T.wait(dur, turn_xi * sgn)
            turn_J = _Wheels(robot, turn_xi[None, :], np.zeros((1, 3)))
            tdur, lim, wpk = _turn(robot, turn_J, names, delta)
            T.turn(delta, tdur, turn_xi, _turn_limits(turn_J, a))
            plan.resteer_time, plan.turn_time = dur, tdur
            plan.peak_spin = {names[i]: float(p) for i, p in zip(turn_J.idx, wpk)}
            plan.stops = [{"waypoint": 0, "turn": delta, "turn_time": tdur, "resteer_time": dur, "limit": lim}]
    except _Infeasible as exc:
        return Plan(robot.name, motion, False, exc.reason)
    T.finish()
    plan.t, plan.pose, plan.hint, plan.phase, plan.speed, plan.index = T.arrays()
    plan.path, plan.profile = path, np.zeros(1)
    plan.time = plan.turn_time + plan.resteer_time
    return plan
