"""What the engine decided, in words: read from the step record, never re-derived.

:func:`row_notes` says what one row shows (the window's panel);
:class:`Tally` folds whole runs, block by block, in one compiled pass, into the
run's figures (distance, peak slip) and the first time, the duration and the
extreme of each decision (the summary and ``--json``).
"""
from __future__ import annotations

import math

import numpy as np

from sim.engine.record import NROW, NWHEEL, ROW, WHEEL
from sim.jit import kernel

FIT_WORDS = {1: "projected onto what the fixed wheels allow", 2: "followed by skid steering (least squares, the wheels slip)"}


def row_notes(robot, row, align: str = "wait") -> list:
    """Short sentences for one :class:`~sim.engine.record.StepResult`: waiting for steering,
    scaled by ``max_spin``, projected or skid-steered, wheels at a steering limit."""
    out = []
    names = [w.name for w in robot.wheels]
    if row.held:
        togo = np.abs(np.nan_to_num(row.to_go))
        out.append(f"waiting for steering (align {align}): {math.degrees(float(togo.max())):.1f} deg to go")
    lim = [names[i] for i, v in enumerate(row.at_limit) if v == 1.0]
    if lim:
        out.append(f"at a steering limit: {', '.join(lim)} (the goal lies beyond it; the wheel slips)")
    if row.cmd_twist is not None:
        if row.fit == 1:
            parts = [f"{name} {v:.3f}{unit}" for name, v, unit in
                     zip(("vx", "vy", "omega"), row.shortfall, (" m/s", " m/s", " rad/s")) if abs(v) > 1e-9]
            out.append("cannot follow " + ", ".join(parts) + ": the fixed wheels forbid it")
        elif row.fit == 2:
            out.append(f"skid steering: wheel speeds whose least-squares motion is the request; slip {row.slip:.3g} m/s")
        if row.scale < 1.0:
            out.append(f"request scaled to {100 * row.scale:.1f} % by max_spin")
    return out


# slots of a tally (:class:`Tally`): the run's figures, then per decision kind KIND_SLOTS
# slots (first time, rows, extreme, its time, an extra twist), then per wheel the first
# time it sat at a steering limit (NaN: never)
T_DIST, T_LAST_X, T_LAST_Y, T_SLIP, T_SLIP_T, T_UNDER_T = range(6)
KINDS = ("held", "scaled", "projected", "skid", "at_limit")
HELD, SCALED, PROJECTED, SKID, AT_LIMIT = range(5)
K0, KIND_SLOTS = 8, 8
F_FIRST, F_ROWS, F_EXT, F_EXT_T, F_TWIST = range(5)
T_WHEELS = K0 + KIND_SLOTS * len(KINDS)

_T, _X, _Y, _SLIP, _RANK = ROW["t"], ROW["x"], ROW["y"], ROW["slip"], ROW["rank"]
_SCALE, _SHORT, _FIT, _HELD = ROW["scale"], ROW["short_vx"], ROW["fit"], ROW["held"]
_W_TO_GO, _W_LIMIT = WHEEL["to_go"], WHEEL["at_limit"]


@kernel
def _seen(acc, kind, t, value, larger):
    """Count one row of ``kind`` at ``t`` whose extreme candidate is ``value``; True when it
    is the new extreme (the first row, or strictly beyond: the earliest extreme is kept)."""
    o = K0 + KIND_SLOTS * kind
    first = acc[o + F_ROWS] == 0.0
    acc[o + F_ROWS] += 1.0
    if first:
        acc[o + F_FIRST] = t
    if first or (value > acc[o + F_EXT] if larger else value < acc[o + F_EXT]):
        acc[o + F_EXT], acc[o + F_EXT_T] = value, t
        return True
    return False


@kernel
def tally_rows(values, n, size, acc):
    """Fold rows ``values`` (m, width(n)), in order, into the tally ``acc``; ``size`` is the
    base size L (m) of the shortfall metric (1, 1, L).  One pass, compiled: a run's summary
    costs little beside its steps."""
    for r in range(values.shape[0]):
        v = values[r]
        t = v[_T]
        if acc[T_LAST_X] == acc[T_LAST_X]:
            acc[T_DIST] += math.hypot(v[_X] - acc[T_LAST_X], v[_Y] - acc[T_LAST_Y])
        acc[T_LAST_X], acc[T_LAST_Y] = v[_X], v[_Y]
        if v[_SLIP] > acc[T_SLIP]:
            acc[T_SLIP], acc[T_SLIP_T] = v[_SLIP], t
        if v[_RANK] < 3.0 and acc[T_UNDER_T] != acc[T_UNDER_T]:
            acc[T_UNDER_T] = t
        if v[_HELD] == 1.0:
            togo = 0.0
            for i in range(n):
                a = abs(v[NROW + NWHEEL * i + _W_TO_GO])
                if a > togo:                      # blank (NaN) for wheels that are not steered
                    togo = a
            _seen(acc, HELD, t, togo, True)
        if v[_SCALE] < 1.0:
            _seen(acc, SCALED, t, v[_SCALE], False)
        if v[_FIT] == 1.0:
            sx, sy, sw = v[_SHORT], v[_SHORT + 1], v[_SHORT + 2] * size
            if _seen(acc, PROJECTED, t, math.sqrt(sx * sx + sy * sy + sw * sw), True):
                o = K0 + KIND_SLOTS * PROJECTED + F_TWIST
                acc[o], acc[o + 1], acc[o + 2] = v[_SHORT], v[_SHORT + 1], v[_SHORT + 2]
        elif v[_FIT] == 2.0:
            _seen(acc, SKID, t, v[_SLIP], True)
        count = 0.0
        for i in range(n):
            if v[NROW + NWHEEL * i + _W_LIMIT] == 1.0:
                count += 1.0
                if acc[T_WHEELS + i] != acc[T_WHEELS + i]:
                    acc[T_WHEELS + i] = t
        if count > 0.0:
            _seen(acc, AT_LIMIT, t, count, True)


class Tally:
    """A run's figures and the engine's decisions, folded block by block (:func:`tally_rows`).

    Figures: ``distance`` (m, along the body origin), ``peak_slip`` (m/s) and its time
    ``peak_slip_t`` (s), ``underdetermined_t`` (s: the first row of rank below 3, or None).
    Decision kinds, each with its first time (s), rows and extreme: ``held`` (drives waiting
    for steering; extreme: largest steering to go, rad), ``scaled`` (request cut by
    ``max_spin``; extreme: smallest factor), ``projected`` (extreme: largest shortfall in the
    metric (1, 1, L), with the twist), ``skid`` (extreme: peak slip, m/s), ``at_limit``
    (wheels at a steering limit; extreme: most at once; their names, in the order they
    first got there).
    """

    def __init__(self, robot, dt: float):
        self.robot = robot
        self.dt = dt
        self.acc = np.zeros(T_WHEELS + len(robot.wheels))
        self.acc[[T_LAST_X, T_LAST_Y, T_UNDER_T]] = np.nan
        self.acc[T_WHEELS:] = np.nan

    def fold(self, block) -> None:
        """Add a :class:`~sim.engine.record.Block` (rows in order, following the last)."""
        tally_rows(block.values, block.n, float(self.robot.size), self.acc)

    @property
    def distance(self) -> float:
        return float(self.acc[T_DIST])

    @property
    def peak_slip(self) -> tuple:
        """(peak slip m/s, its time s)."""
        return float(self.acc[T_SLIP]), float(self.acc[T_SLIP_T])

    @property
    def underdetermined_t(self):
        t = self.acc[T_UNDER_T]
        return None if t != t else float(t)

    @property
    def kinds(self) -> dict:
        """``{kind: {first_t, rows, extreme, extreme_t, ..., seconds}}`` for the kinds that occurred
        (times and seconds in s, the extreme in the kind's unit)."""
        out = {}
        for j, kind in enumerate(KINDS):
            o = K0 + KIND_SLOTS * j
            rows = int(self.acc[o + F_ROWS])
            if not rows:
                continue
            d = {"first_t": float(self.acc[o + F_FIRST]), "rows": rows, "extreme": float(self.acc[o + F_EXT]),
                 "extreme_t": float(self.acc[o + F_EXT_T])}
            if j == PROJECTED:
                d["twist"] = [float(v) for v in self.acc[o + F_TWIST: o + F_TWIST + 3]]
            elif j == AT_LIMIT:
                first = self.acc[T_WHEELS:]
                order = sorted(np.flatnonzero(first == first), key=lambda i: (first[i], i))
                d["wheels"] = [self.robot.wheels[i].name for i in order]
            d["seconds"] = rows * self.dt
            out[kind] = d
        return out

    def lines(self) -> list:
        """One sentence per decision the engine took during the run."""
        out = []
        k = self.kinds
        if "held" in k:
            d = k["held"]
            out.append(f"drives held for steering from t={d['first_t']:g} s, {d['seconds']:g} s in all "
                       f"(largest steering to go {math.degrees(d['extreme']):.1f} deg)")
        if "scaled" in k:
            d = k["scaled"]
            out.append(f"requests scaled down by max_spin from t={d['first_t']:g} s, {d['seconds']:g} s in all "
                       f"(smallest factor {d['extreme']:.4g} at t={d['extreme_t']:g} s)")
        if "projected" in k:
            d = k["projected"]
            vx, vy, w = d["twist"]
            out.append(f"requests the fixed wheels forbid, projected from t={d['first_t']:g} s, "
                       f"{d['seconds']:g} s in all (largest shortfall at t={d['extreme_t']:g} s: "
                       f"vx {vx:.4g} m/s, vy {vy:.4g} m/s, omega {w:.4g} rad/s, requested minus followed)")
        if "skid" in k:
            d = k["skid"]
            out.append(f"skid steering from t={d['first_t']:g} s, {d['seconds']:g} s in all: wheel speeds "
                       f"whose least-squares motion is the request (peak slip {d['extreme']:.4g} m/s)")
        if "at_limit" in k:
            d = k["at_limit"]
            out.append(f"steering goal beyond a limit for {', '.join(d['wheels'])} from t={d['first_t']:g} s, "
                       f"{d['seconds']:g} s in all (the wheel holds at its limit and slips)")
        return out
