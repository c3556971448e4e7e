"""Tracking controllers: the body twist that keeps a base on its planned motion.

Each law is written once, as a compiled function on plain arrays (:func:`control`
dispatches), so that the stepping loop calls it every step inside the compiled stretch
(:func:`run_tracking`, used by :mod:`sim.runs.closedloop` through
:meth:`sim.engine.simulator.Simulator.advance_tracking`).

The reference is a plan from :mod:`sim.theory.speedplan`, as arrays: ``plan_t`` (M,) s,
non-decreasing; ``plan_pose`` (M, 3) the body origin's reference pose (world, m, rad,
theta continuous); ``plan_speed`` (M,) the speed along the plan at each row (m/s, or
rad/s while turning in place); ``plan_hint`` (M, 3) the body twist per unit speed of the motion
under way or next; ``plan_index`` (M,) the path sample each row is at; ``path_xy``
(P, 2) m the tracked point's path.  Between two rows the plan moves with constant
acceleration (its speed changes linearly from one row's to the next), so the reference
at time t lies the fraction ``(v0 tau + (v1 - v0) tau^2 / (2 T)) / ((v0 + v1) T / 2)``
of the way from one row's pose to the next, tau = t - t_k, T = t_k+1 - t_k.

Feedforward: the body twist that carries the reference from its pose at t to its pose
at t + dt along a constant twist (the SE(2) logarithm of the relative pose, divided by
dt).  A base exactly on its reference and driven by this twist for one step lands
exactly on the reference again: the plan is the feedforward, the feedback below only
removes errors.

Timing: the engine moves a base over the step from t_k with the actuators as they are
at t_k, and rate-limited actuators reach a new command only over that step (see
:mod:`sim.engine.step`).  So a command given at t_k shapes the motion from t_k+1 on.
:func:`control` therefore looks one step ahead (``lead``): it predicts the pose at
t_k+1 from the motion already under way (:func:`motion_now`, the engine's own forward
kinematics) and computes the law there, for the step from t_k+1.

Laws (gains as arrays, see :data:`GAIN_NAMES`):

* ``LAW_OMNI`` -- omnidirectional bases track position and heading independently:
  feedforward plus proportional feedback on the position error (k_position, 1/s) and
  on the heading error (k_heading, 1/s) (common practice for holonomic bases).
* ``LAW_KANAYAMA`` -- bases whose ICR lies on a line (differential, car-like): the
  tracking law of Kanayama, Kimura, Miyazaki & Noguchi ("A stable tracking control
  method for an autonomous mobile robot", IEEE ICRA 1990):
  ``v = v_r cos e_theta + k_x e_x``, ``omega = omega_r + v_r (k_y e_y + k_theta sin e_theta)``,
  the errors taken at the tracked point in its own frame; plus ``k_turn sin e_theta``
  (1/s), a proportional heading term that keeps acting when the reference turns in place
  or stands (v_r = 0), where the original law gives no heading feedback.
* ``LAW_STEERED`` -- steered-wheel bases whose heading is free: as ``LAW_OMNI``, but while
  the route goes on the feedback is capped at ``max_correction`` times the reference
  speed, so that the modules stay within about atan(max_correction) of the planned
  direction and are never swung round to correct a few millimetres while the base waits
  at a corner (under the ``wait`` policy that would stall it); once the route is done
  the feedback acts in full and brings the base onto its end pose.

Whenever the reference stands still, bases with steered wheels are commanded a
creeping twist (``HINT_SPEED`` times the hint) so that the engine turns their wheels
toward the coming motion while the plan waits for them (re-steering), as the align
policy allows; once the route is done the hint is zero.
"""
from __future__ import annotations

import math

import numpy as np

from sim.engine.step import G_DT, G_K, G_RATE, G_SCALE, G_TH, G_X, HEAD, SPIN, set_twist, step_into
from sim.jit import kernel
from sim.theory.constraints import motion_rows_into
from sim.theory.kinematics import solve_motion
from sim.theory.linalg import pinv_into
from sim.theory.se2 import compose, exp_increment, log_twist, wrap

LAW_OMNI, LAW_KANAYAMA, LAW_STEERED = 0, 1, 2
LAWS = {"omni": LAW_OMNI, "kanayama": LAW_KANAYAMA, "steered": LAW_STEERED}
GAIN_NAMES = {
    "omni": ("k_position", "k_heading"),
    "kanayama": ("k_x", "k_y", "k_theta", "k_turn"),
    "steered": ("k_position", "k_heading", "max_correction"),
}
DEFAULT_GAINS = {
    "omni": (4.0, 4.0),                 # 1/s, 1/s
    "kanayama": (4.0, 40.0, 12.0, 4.0),  # 1/s, 1/m^2, 1/m, 1/s
    "steered": (4.0, 4.0, 0.5),         # 1/s, 1/s, 1
}
GAIN_UNITS = {"k_position": "1/s", "k_heading": "1/s", "k_x": "1/s", "k_y": "1/m^2", "k_theta": "1/m",
              "k_turn": "1/s", "max_correction": "a fraction of the reference speed"}
HINT_SPEED = 1e-4       # m/s per unit hint: the creep that pre-steers wheels while the plan waits
PATH_WINDOW = 400       # path samples searched on either side of the reference for the path error
OUT_SIZE = 7            # control() output: twist (3), reference pose (3), path error (1)


@kernel
def motion_now(P, scale, heading, spin, A, Pm, rows, W, residual, xi):
    """Body twist ``xi`` (3,) the wheels give at ``heading``, ``spin`` (n,): the motion from
    t_k that the engine computes (the same rows, map and solve as :mod:`sim.engine.step`).
    ``P`` the packed wheels, ``scale`` the twist metric (3,); ``A`` (2n, 3), ``Pm`` (3, 2n),
    ``rows`` (2, 2n) int, ``W`` (2n + 4, 3), ``residual`` (2n,) are workspace."""
    m = motion_rows_into(P, heading, A, rows[0], rows[1])
    pinv_into(A, m, scale, W, Pm)
    solve_motion(P, A, Pm, m, rows[0], rows[1], spin, xi, residual)


@kernel
def reference(plan_t, plan_pose, plan_speed, t, out):
    """Reference pose at time ``t`` into ``out`` (3,); returns the row k with plan_t[k] <= t
    (0 before the plan, M - 1 after it)."""
    m = plan_t.shape[0]
    if t <= plan_t[0]:
        for i in range(3):
            out[i] = plan_pose[0, i]
        return 0
    if t >= plan_t[m - 1]:
        for i in range(3):
            out[i] = plan_pose[m - 1, i]
        return m - 1
    k = np.searchsorted(plan_t, t, side="right") - 1
    T = plan_t[k + 1] - plan_t[k]
    tau = t - plan_t[k]
    v0, v1 = plan_speed[k], plan_speed[k + 1]
    if v0 + v1 > 0.0:
        f = (v0 * tau + 0.5 * (v1 - v0) * tau * tau / T) / (0.5 * (v0 + v1) * T)
    else:
        f = tau / T
    for i in range(3):
        out[i] = plan_pose[k, i] + f * (plan_pose[k + 1, i] - plan_pose[k, i])
    return k


@kernel
def feedforward(plan_t, plan_pose, plan_speed, t, dt, out):
    """Body twist (3,) into ``out`` that moves the reference from t to t + dt (SE(2) log / dt),
    expressed in the reference's body frame; returns the row index at t."""
    r0 = np.empty(3)
    r1 = np.empty(3)
    k = reference(plan_t, plan_pose, plan_speed, t, r0)
    reference(plan_t, plan_pose, plan_speed, t + dt, r1)
    c, s = math.cos(r0[2]), math.sin(r0[2])
    dx = c * (r1[0] - r0[0]) + s * (r1[1] - r0[1])
    dy = -s * (r1[0] - r0[0]) + c * (r1[1] - r0[1])
    out[0], out[1], out[2] = log_twist(dx, dy, r1[2] - r0[2], dt)
    return k


@kernel
def path_error(px, py, plan_index, k, path_xy):
    """m: distance from point (px, py) to the path polyline near plan row ``k``."""
    p = path_xy.shape[0]
    c = plan_index[k]
    lo = max(c - PATH_WINDOW, 0)
    hi = min(c + PATH_WINDOW, p - 1)
    best = math.inf
    if hi == lo:
        return math.hypot(px - path_xy[lo, 0], py - path_xy[lo, 1])
    for j in range(lo, hi):
        ax, ay = path_xy[j, 0], path_xy[j, 1]
        bx, by = path_xy[j + 1, 0], path_xy[j + 1, 1]
        ex, ey = bx - ax, by - ay
        L2 = ex * ex + ey * ey
        f = 0.0
        if L2 > 0.0:
            f = ((px - ax) * ex + (py - ay) * ey) / L2
            f = min(max(f, 0.0), 1.0)
        d = math.hypot(px - ax - f * ex, py - ay - f * ey)
        if d < best:
            best = d
    return best


@kernel
def _hint_at(plan_t, plan_hint, k, t):
    """Row whose hint applies at time t in row interval k (the coming one)."""
    m = plan_t.shape[0]
    if t < plan_t[0]:
        return 0
    return min(k + 1, m - 1) if t >= plan_t[k] and k < m - 1 else k


@kernel
def omni_law(pose, ref, ff, gains, out):
    """LAW_OMNI: feedforward ``ff`` (3,) (reference body frame) plus proportional feedback."""
    kp, kh = gains[0], gains[1]
    dth = ref[2] - pose[2]
    c, s = math.cos(pose[2]), math.sin(pose[2])
    ex_w, ey_w = ref[0] - pose[0], ref[1] - pose[1]
    ex = c * ex_w + s * ey_w
    ey = -s * ex_w + c * ey_w
    cr, sr = math.cos(dth), math.sin(dth)
    out[0] = cr * ff[0] - sr * ff[1] + kp * ex
    out[1] = sr * ff[0] + cr * ff[1] + kp * ey
    out[2] = ff[2] + kh * wrap(dth)


@kernel
def steered_law(pose, ref, ff, gains, size, done, out):
    """LAW_STEERED: LAW_OMNI with the feedback capped at max_correction x the reference speed
    (speeds of turning counted at ``size`` m) until the route is ``done``."""
    dth = ref[2] - pose[2]
    c, s = math.cos(pose[2]), math.sin(pose[2])
    ex_w, ey_w = ref[0] - pose[0], ref[1] - pose[1]
    fx = gains[0] * (c * ex_w + s * ey_w)
    fy = gains[0] * (-s * ex_w + c * ey_w)
    fw = gains[1] * wrap(dth)
    if not done:
        speed = math.hypot(ff[0], ff[1]) + size * abs(ff[2])
        fb = math.hypot(fx, fy) + size * abs(fw)
        cap = gains[2] * speed
        if fb > cap:
            g = cap / fb
            fx, fy, fw = g * fx, g * fy, g * fw
    cr, sr = math.cos(dth), math.sin(dth)
    out[0] = cr * ff[0] - sr * ff[1] + fx
    out[1] = sr * ff[0] + cr * ff[1] + fy
    out[2] = ff[2] + fw


@kernel
def kanayama_law(pose, ref, ff, gains, frame, out):
    """LAW_KANAYAMA at the tracked point ``frame`` = (gx, gy, phi) (body point m, direction rad)."""
    kx, ky, kth, kturn = gains[0], gains[1], gains[2], gains[3]
    gx, gy, phi = frame[0], frame[1], frame[2]
    # tracked point and its frame, for the base and for the reference
    c, s = math.cos(pose[2]), math.sin(pose[2])
    bx = pose[0] + c * gx - s * gy
    by = pose[1] + s * gx + c * gy
    bth = pose[2] + phi
    cr, sr = math.cos(ref[2]), math.sin(ref[2])
    rx = ref[0] + cr * gx - sr * gy
    ry = ref[1] + sr * gx + cr * gy
    rth = ref[2] + phi
    cb, sb = math.cos(bth), math.sin(bth)
    ex = cb * (rx - bx) + sb * (ry - by)
    ey = -sb * (rx - bx) + cb * (ry - by)
    eth = wrap(rth - bth)
    # reference speed of the tracked point along its direction, and turn rate
    vpx = ff[0] - ff[2] * gy
    vpy = ff[1] + ff[2] * gx
    vr = math.cos(phi) * vpx + math.sin(phi) * vpy
    wr = ff[2]
    v = vr * math.cos(eth) + kx * ex
    w = wr + vr * (ky * ey + kth * math.sin(eth)) + kturn * math.sin(eth)
    out[0] = v * math.cos(phi) + w * gy
    out[1] = v * math.sin(phi) - w * gx
    out[2] = w


@kernel
def control(law, pose, now, lead, t, dt, plan_t, plan_pose, plan_speed, plan_hint, plan_index, path_xy,
            frame, gains, size, steered, out):
    """One step of tracking: the body twist command for a base at ``pose`` (3,) at time ``t``.

    law : LAW_OMNI | LAW_KANAYAMA | LAW_STEERED.  now : (3,) the body twist the base moves
    with from t to t + dt (:func:`motion_now`).  lead : True when the command shapes the
    motion only from t + dt (rate-limited actuators; module docstring), False when at once.
    dt : s, the step.  frame : (gx, gy, phi) the tracked point (LAW_KANAYAMA; also where the
    path error is measured).  gains : (k,) as :data:`GAIN_NAMES`.  size : m, the base's size
    (turn rates to speeds).  steered : the base has steered wheels (creep along the hint
    while the plan waits).  Writes ``out`` (7,): the twist command (vx, vy, omega) m/s, m/s,
    rad/s; the reference pose at t (x, y, theta); the tracked point's distance from the path
    at t (m).
    """
    ref = np.empty(3)
    ff = np.empty(3)
    cmd = np.empty(3)
    at = np.empty(3)
    k = reference(plan_t, plan_pose, plan_speed, t, ref)
    for i in range(3):
        out[3 + i] = ref[i]
    c, s = math.cos(pose[2]), math.sin(pose[2])
    px = pose[0] + c * frame[0] - s * frame[1]
    py = pose[1] + s * frame[0] + c * frame[1]
    out[6] = path_error(px, py, plan_index, k, path_xy)
    # where and when the command takes effect
    te = t
    for i in range(3):
        at[i] = pose[i]
    if lead:
        dx, dy, dth = exp_increment(now[0], now[1], now[2], dt)
        at[0], at[1], at[2] = compose(pose[0], pose[1], pose[2], dx, dy, dth)
        te = t + dt
    ke = feedforward(plan_t, plan_pose, plan_speed, te, dt, ff)
    reference(plan_t, plan_pose, plan_speed, te, ref)
    if law == LAW_KANAYAMA:
        kanayama_law(at, ref, ff, gains, frame, cmd)
    elif law == LAW_STEERED:
        steered_law(at, ref, ff, gains, size, te >= plan_t[plan_t.shape[0] - 1], cmd)
    else:
        omni_law(at, ref, ff, gains, cmd)
    if steered and math.hypot(ff[0], ff[1]) + size * abs(ff[2]) < 1e-9:
        h = _hint_at(plan_t, plan_hint, ke, te)
        for i in range(3):
            cmd[i] += HINT_SPEED * plan_hint[h, i]
    for i in range(3):
        out[i] = cmd[i]


@kernel
def run_tracking(P, S, g, A, Pm, rows, Wk, out, extra, law, lead, t0, plan_t, plan_pose, plan_speed, plan_hint,
                 plan_index, path_xy, frame, gains, size, steered):
    """``len(out)`` steps under tracking control, all in compiled code: per step the motion
    under way (:func:`motion_now`), the law (:func:`control`) at the plan time ``t - t0``, the
    command, and the engine's step (:func:`sim.engine.step.step_into`) into ``out[j]``.
    ``extra[j]`` gets the reference pose (3) and the path error (m).  State arrays as in
    :mod:`sim.engine.step`."""
    n = P.shape[1]
    ctl = np.empty(OUT_SIZE)
    now = np.empty(3)
    A2 = np.empty((2 * n, 3))
    W2 = np.empty((2 * n + 4, 3))
    res2 = np.empty(2 * n)
    Pm2 = np.empty((3, 2 * n))
    rows2 = np.empty((2, 2 * n), np.int64)
    scale = g[G_SCALE:G_SCALE + 3]
    for j in range(out.shape[0]):
        motion_now(P, scale, S[HEAD], S[SPIN], A2, Pm2, rows2, W2, res2, now)
        k = g[G_K]
        dt = g[G_DT]
        t = k / g[G_RATE] if g[G_RATE] > 0.0 else k * dt
        control(law, g[G_X:G_TH + 1], now, lead, t - t0, dt, plan_t, plan_pose, plan_speed, plan_hint,
                plan_index, path_xy, frame, gains, size, steered, ctl)
        set_twist(g, ctl[0], ctl[1], ctl[2])
        step_into(P, S, g, A, Pm, rows, Wk, out, j, j + 1)
        for i in range(3):
            extra[j, i] = ctl[3 + i]
        extra[j, 3] = ctl[6]
