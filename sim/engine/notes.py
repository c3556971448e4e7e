"""What the engine decided, in words: read from the step record, never re-derived.

:func:`row_notes` says what one row shows (the window's panel);
:class:`Decisions` folds whole runs, block by block, into the first time, the
duration and the extreme of each decision (the summary and ``--json``).
"""
from __future__ import annotations

import math

import numpy as np

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


class Decisions:
    """Per decision kind: first time (s), rows, and the extreme, over a whole run.

    Kinds: ``held`` (drives waiting for steering; extreme: largest steering to go, rad),
    ``scaled`` (request cut by ``max_spin``; extreme: smallest factor), ``projected``
    (extreme: largest shortfall in the metric (1, 1, L), with the twist), ``skid``
    (extreme: peak slip, m/s), ``at_limit`` (wheels at a steering limit; names listed).
    """

    def __init__(self, robot, dt: float):
        self.robot = robot
        self.dt = dt
        self.kinds = {}

    def _add(self, kind, block, mask, extreme, better, extra=None):
        """Fold the rows of ``mask`` into ``kind``; ``extreme(idx)`` gives their values (only
        computed when some row is in the mask)."""
        if not mask.any():
            return
        idx = np.flatnonzero(mask)
        d = self.kinds.setdefault(kind, {"first_t": float(block.t[idx[0]]), "rows": 0, "extreme": None})
        d["rows"] += len(idx)
        vals = extreme(idx)
        j = int(np.argmax(vals) if better == "max" else np.argmin(vals))
        v = float(vals[j])
        if d["extreme"] is None or (v > d["extreme"] if better == "max" else v < d["extreme"]):
            d["extreme"], d["extreme_t"] = v, float(block.t[idx[j]])
            if extra is not None:
                d.update(extra(idx[j]))

    def fold(self, block) -> None:
        """Add a :class:`~sim.engine.record.Block` (rows in order)."""
        size = np.array([1.0, 1.0, self.robot.size])
        fit = block.fit
        self._add("held", block, block.held == 1.0,
                  lambda i: np.nan_to_num(np.abs(block.to_go[i])).max(axis=1), "max")
        scale = block.scale
        self._add("scaled", block, scale < 1.0, lambda i: scale[i], "min")
        self._add("projected", block, fit == 1.0,
                  lambda i: np.sqrt(((block.shortfall[i] * size) ** 2).sum(axis=1)), "max",
                  lambda j: {"twist": [float(v) for v in block.shortfall[j]]})
        self._add("skid", block, fit == 2.0, lambda i: block.slip[i], "max")
        lim = block.at_limit == 1.0          # blank (NaN) for wheels that are not steered: never 1
        rows = lim.any(axis=1)
        if rows.any():
            self._add("at_limit", block, rows, lambda i: lim[i].sum(axis=1).astype(float), "max")
            names = self.kinds["at_limit"].setdefault("wheels", [])
            for i in np.flatnonzero(lim.any(axis=0)):
                if self.robot.wheels[i].name not in names:
                    names.append(self.robot.wheels[i].name)

    def as_dict(self) -> dict:
        """``{kind: {first_t, seconds, extreme, extreme_t, ...}}`` (s, and the kind's unit)."""
        out = {}
        for kind, d in self.kinds.items():
            e = dict(d)
            e["seconds"] = d["rows"] * self.dt
            out[kind] = e
        return out

    def lines(self) -> list:
        """One sentence per decision the engine took during the run."""
        out = []
        k = self.kinds
        if "held" in k:
            d = k["held"]
            out.append(f"drives held for steering from t={d['first_t']:g} s, {d['rows'] * self.dt:g} s in all "
                       f"(largest steering to go {math.degrees(d['extreme']):.1f} deg)")
        if "scaled" in k:
            d = k["scaled"]
            out.append(f"requests scaled down by max_spin from t={d['first_t']:g} s, {d['rows'] * self.dt:g} s in all "
                       f"(smallest factor {d['extreme']:.4g} at t={d['extreme_t']:g} s)")
        if "projected" in k:
            d = k["projected"]
            vx, vy, w = d["twist"]
            out.append(f"requests the fixed wheels forbid, projected from t={d['first_t']:g} s, "
                       f"{d['rows'] * self.dt:g} s in all (largest shortfall at t={d['extreme_t']:g} s: "
                       f"vx {vx:.4g} m/s, vy {vy:.4g} m/s, omega {w:.4g} rad/s, requested minus followed)")
        if "skid" in k:
            d = k["skid"]
            out.append(f"skid steering from t={d['first_t']:g} s, {d['rows'] * self.dt:g} s in all: wheel speeds "
                       f"whose least-squares motion is the request (peak slip {d['extreme']:.4g} m/s)")
        if "at_limit" in k:
            d = k["at_limit"]
            out.append(f"steering goal beyond a limit for {', '.join(d['wheels'])} from t={d['first_t']:g} s, "
                       f"{d['rows'] * self.dt:g} s in all (the wheel holds at its limit and slips)")
        return out
