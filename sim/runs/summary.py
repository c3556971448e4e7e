"""The run summary as one JSON-ready mapping: ``trundle run --json``.

:func:`summary_dict` reads a :class:`~sim.runs.runner.RunResult` (nothing is
recomputed) and returns plain Python values (str, float, int, bool, None,
lists, dicts): SI units, angles in rad with degrees beside them where people
read them.  Keys:

``scenario``, ``description``, ``robot``, ``rows``, ``step`` (s), ``duration`` (s, of the rows
run), ``interrupted``, ``passed``; ``distance`` (m); ``final_pose`` {x, y (m),
theta (rad), theta_deg}; ``peak_slip`` {value (m/s), t (s)}; ``shortfall``
(None, or the largest twist request the base could not follow: {t, vx, vy,
omega}, requested minus followed); ``underdetermined_from`` (s or None);
``odometry`` (the estimate's final and peak errors, or None); ``checks``: per
check {passed, kind, at (s or None), line, text, expected}, ``text`` saying
what was measured against what was expected; ``warnings``: plausibility
warnings of the files (``file:line: warning: ...``); ``decisions``: the
engine's record of what it decided during the run (``RunResult.decisions``:
per kind, ``held``, ``scaled``, ``projected``, ``skid``, ``at_limit``, the
first time, rows and extreme); ``notes``: the same as the text summary's
sentences (``RunResult.notes``).
"""
from __future__ import annotations

import math


def _num(v):
    """A float for JSON: None for NaN or infinities (JSON has neither)."""
    v = float(v)
    return v if math.isfinite(v) else None


def _plain(v):
    """Check parameters as JSON values (numbers in SI, nested mappings kept)."""
    if isinstance(v, dict):
        return {str(k): _plain(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_plain(x) for x in v]
    if isinstance(v, bool) or v is None or isinstance(v, str):
        return v
    if isinstance(v, (int, float)):
        return _num(v)
    return str(v)


def _note(n):
    if isinstance(n, dict):
        return _plain(n)
    if hasattr(n, "__dict__"):
        return _plain(vars(n))
    return str(n)


def summary_dict(res, warnings=()) -> dict:
    """The summary of ``res`` (a RunResult) as a JSON-ready dict; see the module docstring."""
    s = res.scenario
    x, y, th = res.final_pose
    checks = []
    for c, spec in zip(res.checks, s.checks):
        checks.append({"passed": bool(c.passed), "kind": spec.kind, "at": _num(spec.at) if spec.at is not None else None,
                       "line": c.line, "text": c.text, "expected": _plain(spec.params)})
    out = {
        "scenario": s.source,
        "description": s.description,
        "robot": s.robot.name,
        "rows": int(res.rows),
        "step": s.step,
        "duration": _num(max(res.rows - 1, 0) * s.step),
        "interrupted": bool(res.interrupted),
        "passed": bool(res.passed) and not res.interrupted,
        "distance": _num(res.distance),
        "final_pose": {"x": _num(x), "y": _num(y), "theta": _num(th), "theta_deg": _num(math.degrees(th))},
        "peak_slip": {"value": _num(res.peak_slip), "t": _num(res.peak_slip_t)},
        "shortfall": None,
        "underdetermined_from": _num(res.underdetermined_t) if res.underdetermined_t is not None else None,
        "odometry": _plain(res.odometry) if res.odometry else None,
        "checks": checks,
        "warnings": [str(w) for w in warnings],
        "decisions": _plain(getattr(res, "decisions", None) or {}),
        "notes": [_note(n) for n in (getattr(res, "notes", None) or ())],
    }
    if res.peak_shortfall > 1e-9:
        vx, vy, w = res.peak_shortfall_twist
        out["shortfall"] = {"t": _num(res.peak_shortfall_t), "vx": _num(vx), "vy": _num(vy), "omega": _num(w)}
    return out
