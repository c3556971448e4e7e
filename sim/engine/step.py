"""The step, written once and compiled: one fixed step of a base from t_k to t_k + dt.

:func:`step_into` does, for each row k of a stretch (see :mod:`sim.engine.record` for what
a row holds):

1. commands: under a new twist command the inverse kinematics
   (:func:`sim.theory.kinematics.inverse_into`: projection onto what the fixed
   wheels allow or skid-steer least squares, steering angles within limits,
   scaling under ``max_spin``) gives steering goals and spin targets;
2. steering: each steered wheel's reachable goal (clamped to ``steer_limits``),
   what is still to go, whether the goal lies beyond a limit;
3. alignment policy, under a twist command while steered wheels still turn:
   ``wait`` holds every drive at 0 until all are within ``align_tolerance``,
   ``cosine`` scales each steered drive by cos(error), ``none`` drives at once;
4. motion from t_k: the body twist is the least-squares solution of the rolling
   rows of driven wheels and the no-sliding rows of fixed and steered wheels at
   the current angles and spins (:func:`sim.theory.kinematics.solve_motion`);
   the residuals are the slip; passive wheels roll freely; the row is written;
5. over the step: the pose advances by the exact SE(2) exponential, castors
   swivel exactly (:func:`sim.theory.castor.swivel_one`), wheel angles
   integrate, steered wheels move toward their goals at ``max_steer_rate``,
   drives ramp toward their targets at ``max_spin_accel`` (under a twist
   command all together, so their speeds stay consistent) within ``max_spin``.

An actuator without a rate limit (``max_steer_rate`` or ``max_spin_accel``
infinite) is at its command from the instant the command is given: before
step 4, so row k shows it there (under a twist command the drives jump only
when none of them is rate limited, as they move together).

:func:`run_stretch` runs m steps under the commands in force and fills m rows,
:func:`run_timed` applies commands given ahead (a command log) as their steps
come: scripts, command logs and built-in controllers run whole stretches in
compiled code; :meth:`sim.engine.simulator.Simulator.step` runs a stretch of one.  Both
are this code, so stepping one at a time and running a stretch give the same
bytes.  Small solves are explicit sums (:mod:`sim.theory.linalg`), no BLAS or
LAPACK: the bytes do not depend on the machine's math library.

State lives in plain arrays owned by the simulator:

``P`` (NPARAM, n)
    the wheels (:attr:`sim.model.robot.Robot.packed`).
``S`` (NSTATE, n)
    per-wheel state: rows ``HEAD`` (rad), ``SPIN`` (rad/s), ``ANGLE`` (rad),
    ``SPIN_CMD`` (rad/s), ``STEER_CMD`` (rad), and the caches ``FK_HEAD``
    (angles of the rows in ``A``), ``IK_HEAD`` (angles the request was resolved
    at), ``IK_STEER``, ``IK_SPIN`` (the request's wheel commands), ``TARGET`` (scratch).
``g`` (NG,)
    everything else: pose, command, settings, metric, admissible basis, cache flags.
``A`` (2n, 3), ``Pm`` (3, 2n), ``rows`` (2, 2n) int, ``Wk`` (2n + 4, 3)
    the rows of the body-motion solve, their least-squares map, whose rows they
    are (wheel, rolling), and workspace; reused while the angles do not change.
"""
from __future__ import annotations

import math

import numpy as np

from sim.engine.record import NROW, NWHEEL, ROW, WHEEL
from sim.jit import compile_all, kernel
from sim.model.robot import (CASTOR, FIXED, P_CODE, P_DRIVEN, P_MAX_ACCEL, P_MAX_SPIN, P_STEER_HI,
                             P_STEER_LO, P_STEER_RATE, P_TRAIL, P_X, P_Y, STEERED)
from sim.theory.castor import swivel_one
from sim.theory.constraints import motion_rows_into
from sim.theory.kinematics import (I_FIT, I_SCALE, I_SHORT_VX, NINFO, passive_spins_into,
                                   inverse_into, solve_motion)
from sim.theory.linalg import pinv_into
from sim.theory.se2 import compose, exp_increment

compile_all()

# rows of S
HEAD, SPIN, ANGLE, SPIN_CMD, STEER_CMD, FK_HEAD, IK_HEAD, IK_STEER, IK_SPIN, TARGET = range(10)
NSTATE = 10

# slots of g
G_X, G_Y, G_TH = 0, 1, 2            # pose at t_k
G_MODE = 3                          # MODE_WHEELS or MODE_TWIST
G_CMD = 4                           # requested twist (3)
G_DT, G_RATE, G_K = 7, 8, 9         # step s; 1/step when whole (else 0); step index k
G_ALIGN, G_ALIGN_TOL, G_SKID = 10, 11, 12
G_SCALE = 13                        # metric (1, 1, 1/L) (3)
G_N, G_NK = 16, 25                  # admissible basis (3x3, row-major), its size
G_FK_OK, G_FK_M, G_FK_RANK = 26, 27, 28
G_IK_OK = 29
G_INFO = 30                         # inverse_into's info (NINFO)
G_XI = G_INFO + NINFO               # twist from t_k (3)
NG = G_XI + 3

MODE_WHEELS, MODE_TWIST = 0.0, 1.0
ALIGN_CODES = {"wait": 0.0, "cosine": 1.0, "none": 2.0}
WAIT, COSINE = 0.0, 1.0
ICR_OMEGA_MIN = 1e-9  # rad/s: below this the motion counts as pure translation (no ICR)

_T, _X, _Y, _TH = ROW["t"], ROW["x"], ROW["y"], ROW["theta"]
_VX, _ICR, _SLIP, _CMD = ROW["vx"], ROW["icr_x"], ROW["slip"], ROW["cmd_vx"]
_SCALE, _SHORT, _FIT, _HELD, _RANK = ROW["scale"], ROW["short_vx"], ROW["fit"], ROW["held"], ROW["rank"]
_W_SPIN_CMD, _W_SPIN, _W_STEER_CMD, _W_STEER = WHEEL["spin_cmd"], WHEEL["spin"], WHEEL["steer_cmd"], WHEEL["steer"]
_W_LONG, _W_LAT, _W_ANGLE = WHEEL["slip_long"], WHEEL["slip_lat"], WHEEL["angle"]
_W_TO_GO, _W_LIMIT = WHEEL["to_go"], WHEEL["at_limit"]


@kernel
def step_into(P, S, g, A, Pm, rows, Wk, out, j0, j1):
    """Steps j0 .. j1 - 1 of a stretch under the commands in force (module docstring):
    row k of each into ``out[j]`` (out: (m, width)), advancing the state.

    The steps loop here, inside one compiled function, with the views of the state made
    once: a compiled call per step (or a view made per step) costs atomic reference counts
    on every array it touches, which took about a fifth of a step's time."""
    n = P.shape[1]
    nan = np.nan
    dt = g[G_DT]
    head, spin, target = S[HEAD], S[SPIN], S[TARGET]
    info, xi, res = g[G_INFO:G_INFO + NINFO], g[G_XI:G_XI + 3], Wk[:, 0]
    wheel, rolling = rows[0], rows[1]
    for j in range(j0, j1):
        twist_mode = g[G_MODE] == MODE_TWIST
        # 1. inverse kinematics, once per request: the goals it picks depend on the angles at the time
        #    only through the choice between an angle and its opposite, which turning toward the
        #    chosen one keeps; a driven castor's spin depends on its angle, so it is redone when one swivels
        if twist_mode:
            if g[G_IK_OK] != 0.0:
                for i in range(n):
                    if P[P_CODE, i] == CASTOR and P[P_DRIVEN, i] != 0.0 and S[IK_HEAD, i] != head[i]:
                        g[G_IK_OK] = 0.0
                        break
            if g[G_IK_OK] == 0.0:
                inverse_into(P, g[G_SCALE:G_SCALE + 3], g[G_N:G_N + 9].reshape((3, 3)), int(g[G_NK]),
                             g[G_CMD:G_CMD + 3], head, g[G_SKID] != 0.0, S[IK_STEER], S[IK_SPIN], info)
                for i in range(n):
                    S[IK_HEAD, i] = head[i]
                g[G_IK_OK] = 1.0
            for i in range(n):
                target[i] = S[IK_SPIN, i]
                if P[P_CODE, i] == STEERED:
                    S[STEER_CMD, i] = S[IK_STEER, i]
        # 2. steering goals
        held = 0.0
        for i in range(n):
            o = NROW + NWHEEL * i
            if P[P_CODE, i] == STEERED:
                goal = min(max(S[STEER_CMD, i], P[P_STEER_LO, i]), P[P_STEER_HI, i])
                if P[P_STEER_RATE, i] == np.inf:
                    head[i] = goal  # no rate limit: there from t_k on
                out[j, o + _W_TO_GO] = goal - head[i]
                out[j, o + _W_LIMIT] = 1.0 if goal != S[STEER_CMD, i] else 0.0
            else:
                out[j, o + _W_TO_GO] = nan
                out[j, o + _W_LIMIT] = nan
        # 3. alignment policy
        if twist_mode:
            if g[G_ALIGN] == WAIT:
                for i in range(n):
                    if P[P_CODE, i] == STEERED and abs(out[j, NROW + NWHEEL * i + _W_TO_GO]) > g[G_ALIGN_TOL]:
                        held = 1.0
                        break
            for i in range(n):
                if P[P_DRIVEN, i] == 0.0 or held != 0.0:
                    S[SPIN_CMD, i] = 0.0
                elif g[G_ALIGN] == COSINE and P[P_CODE, i] == STEERED:
                    S[SPIN_CMD, i] = target[i] * max(math.cos(out[j, NROW + NWHEEL * i + _W_TO_GO]), 0.0)
                else:
                    S[SPIN_CMD, i] = target[i]
        # drives without a rate limit are at their commands from t_k on (the others ramp over the step)
        jump = True
        if twist_mode:
            for i in range(n):
                if P[P_DRIVEN, i] != 0.0 and P[P_MAX_ACCEL, i] != np.inf and S[SPIN_CMD, i] != spin[i]:
                    jump = False
        for i in range(n):
            if P[P_DRIVEN, i] != 0.0 and jump and (twist_mode or P[P_MAX_ACCEL, i] == np.inf):
                spin[i] = min(max(S[SPIN_CMD, i], -P[P_MAX_SPIN, i]), P[P_MAX_SPIN, i])
        # 4. motion from t_k (the rows and their map kept while the angles stay the same)
        same = g[G_FK_OK] != 0.0
        if same:              # only wheels that give rows count: a passive castor's swivel changes none
            for i in range(n):
                if S[FK_HEAD, i] != head[i] and (P[P_DRIVEN, i] != 0.0 or P[P_CODE, i] == FIXED
                                                 or P[P_CODE, i] == STEERED):
                    same = False
                    break
        if not same:
            m = motion_rows_into(P, head, A, wheel, rolling)
            g[G_FK_M] = m
            g[G_FK_RANK] = pinv_into(A, m, g[G_SCALE:G_SCALE + 3], Wk, Pm)
            for i in range(n):
                S[FK_HEAD, i] = head[i]
            g[G_FK_OK] = 1.0
        m = int(g[G_FK_M])
        slip = solve_motion(P, A, Pm, m, wheel, rolling, spin, xi, res)
        passive_spins_into(P, head, xi, spin)
        k = g[G_K]
        x, y, th = g[G_X], g[G_Y], g[G_TH]
        out[j, _T] = k / g[G_RATE] if g[G_RATE] > 0.0 else k * dt
        out[j, _X], out[j, _Y], out[j, _TH] = x, y, th
        out[j, _VX], out[j, _VX + 1], out[j, _VX + 2] = xi[0], xi[1], xi[2]
        c, s = math.cos(th), math.sin(th)       # (the same values compose() takes below: computed once)
        if abs(xi[2]) > ICR_OMEGA_MIN:
            px, py = -xi[1] / xi[2], xi[0] / xi[2]
            out[j, _ICR], out[j, _ICR + 1] = x + c * px - s * py, y + s * px + c * py
        else:
            out[j, _ICR], out[j, _ICR + 1] = nan, nan
        out[j, _SLIP] = slip
        if twist_mode:
            out[j, _CMD], out[j, _CMD + 1], out[j, _CMD + 2] = g[G_CMD], g[G_CMD + 1], g[G_CMD + 2]
            out[j, _SCALE] = info[I_SCALE]
            for c in range(3):
                out[j, _SHORT + c] = info[I_SHORT_VX + c]
            out[j, _FIT] = info[I_FIT]
        else:
            for c in range(4):
                out[j, _CMD + c] = nan
            for c in range(3):
                out[j, _SHORT + c] = 0.0
            out[j, _FIT] = 0.0
        out[j, _HELD] = held
        out[j, _RANK] = g[G_FK_RANK]
        for i in range(n):
            o = NROW + NWHEEL * i
            driven = P[P_DRIVEN, i] != 0.0
            code = P[P_CODE, i]
            out[j, o + _W_SPIN_CMD] = S[SPIN_CMD, i] if driven else nan
            out[j, o + _W_SPIN] = spin[i]
            out[j, o + _W_STEER_CMD] = nan if code == CASTOR else (S[STEER_CMD, i] if code == STEERED else head[i])
            out[j, o + _W_STEER] = head[i]
            out[j, o + _W_LONG] = nan
            out[j, o + _W_LAT] = nan
            out[j, o + _W_ANGLE] = S[ANGLE, i]
        for r in range(m):
            o = NROW + NWHEEL * wheel[r]
            out[j, o + (_W_LONG if rolling[r] != 0 else _W_LAT)] = res[r]
        # 5. over the step
        dx, dy, dth = exp_increment(xi[0], xi[1], xi[2], dt)
        g[G_X], g[G_Y], g[G_TH] = compose(x, y, th, dx, dy, dth)
        g[G_K] = k + 1.0
        worst = 0.0
        for i in range(n):
            S[ANGLE, i] += spin[i] * dt
            code = P[P_CODE, i]
            if code == CASTOR:
                head[i] = swivel_one(head[i], P[P_X, i], P[P_Y, i], P[P_TRAIL, i], xi[0], xi[1], xi[2], dt)
            elif code == STEERED:
                reach = P[P_STEER_RATE, i] * dt
                to_go = out[j, NROW + NWHEEL * i + _W_TO_GO]
                if abs(to_go) <= reach:
                    head[i] = min(max(S[STEER_CMD, i], P[P_STEER_LO, i]), P[P_STEER_HI, i])  # on the goal exactly
                else:
                    head[i] += reach if to_go > 0.0 else -reach
            if P[P_DRIVEN, i] != 0.0 and twist_mode:
                worst = max(worst, abs(S[SPIN_CMD, i] - spin[i]) / (P[P_MAX_ACCEL, i] * dt))
        for i in range(n):
            if P[P_DRIVEN, i] == 0.0:
                continue
            change = S[SPIN_CMD, i] - spin[i]
            if twist_mode:
                if worst > 1.0:
                    change = change / worst
            else:
                dv = P[P_MAX_ACCEL, i] * dt
                change = min(max(change, -dv), dv)
            lim = P[P_MAX_SPIN, i]
            spin[i] = min(max(spin[i] + change, -lim), lim)


@kernel
def set_twist(g, vx, vy, w):
    """Command body twist (vx, vy, w) from now on (the inverse kinematics is redone when it changes)."""
    if g[G_MODE] != MODE_TWIST or g[G_CMD] != vx or g[G_CMD + 1] != vy or g[G_CMD + 2] != w:
        g[G_MODE] = MODE_TWIST
        g[G_CMD], g[G_CMD + 1], g[G_CMD + 2] = vx, vy, w
        g[G_IK_OK] = 0.0


@kernel
def set_wheels(S, g, which, wheel, values):
    """Wheel commands from now on: ``S[which[c], wheel[c]] = values[c]`` for each given
    command c (``which`` is ``SPIN_CMD`` (rad/s) or ``STEER_CMD`` (rad)); the others keep
    theirs, and a twist command in force ends."""
    if g[G_MODE] == MODE_TWIST:
        g[G_MODE] = MODE_WHEELS
        g[G_CMD], g[G_CMD + 1], g[G_CMD + 2] = 0.0, 0.0, 0.0
    for c in range(which.shape[0]):
        S[which[c], wheel[c]] = values[c]


@kernel
def run_timed(P, S, g, A, Pm, rows, Wk, out, at, twist, which, wheel, values, r):
    """``len(out)`` steps under commands given ahead (a command log): row ``i`` of ``values``
    (R, 3) twists (vx, vy, omega) when ``twist``, else (R, C) wheel commands as in
    :func:`set_wheels`, takes effect at step ``at[i]`` (R,) int, in order.  ``r`` is the
    first row not yet applied; returns the next one."""
    j = 0
    while j < out.shape[0]:
        k = g[G_K]
        while r < at.shape[0] and at[r] <= k:
            if twist:
                set_twist(g, values[r, 0], values[r, 1], values[r, 2])
            else:
                set_wheels(S, g, which, wheel, values[r])
            r += 1
        stop = out.shape[0]                   # up to the next command's step
        if r < at.shape[0]:
            stop = min(stop, j + int(at[r] - k))
        step_into(P, S, g, A, Pm, rows, Wk, out, j, stop)
        j = stop
    return r


@kernel
def run_stretch(P, S, g, A, Pm, rows, Wk, out):
    """``len(out)`` steps under the commands in force; row j of ``out`` (m, width) is row k + j."""
    step_into(P, S, g, A, Pm, rows, Wk, out, 0, out.shape[0])
