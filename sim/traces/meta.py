"""Trace metadata: the sidecar ``PATH.meta.json`` written beside every trace.

The CSV stays plain RFC 4180 (ordinary CSV readers load it); what produced it
lives beside it (a Parquet trace also holds the same JSON text in its
key-value metadata under the key ``trundle``)::

    {"trundle": "0.1.0", "scenario": "ward-cart-arc.yaml",
     "scenario_hash": "...", "robot": "ward-cart", "robot_hash": "...",
     "step": 0.01, "every": 1, "rows": 1001, "complete": true,
     "columns": ["t", "x", ...]}

Hashes are the first 16 hex digits of SHA-256 of the scenario and robot
file contents (:class:`~sim.scenario.Scenario`).  The file holds no time stamp
or absolute path, so identical runs give byte-identical sidecars.
"""
from __future__ import annotations

import json
import os

from sim.errors import InputError
from sim.files.atomic import write_text

SUFFIX = ".meta.json"
PARQUET_KEY = "trundle"


def meta_path(csv_path) -> str:
    """``PATH.meta.json`` for trace ``PATH``."""
    return os.fspath(csv_path) + SUFFIX


def trace_meta(scen, columns, every: int) -> dict:
    """What produced a trace of ``scen`` (the sidecar without ``rows`` and ``complete``)."""
    from sim import __version__

    return {
        "trundle": __version__,
        "scenario": os.path.basename(scen.source),
        "scenario_hash": scen.scenario_hash,
        "robot": scen.robot.name,
        "robot_hash": scen.robot_hash,
        "step": scen.step,
        "every": int(every),
        "columns": list(columns),
    }


def finished(meta: dict, rows: int, complete: bool) -> dict:
    """``meta`` with ``rows`` and ``complete`` (in the sidecar's key order)."""
    out = {k: v for k, v in meta.items() if k not in ("rows", "complete", "columns")}
    out["rows"] = int(rows)
    out["complete"] = bool(complete)
    out["columns"] = list(meta.get("columns", ()))
    return out


def meta_text(data: dict) -> str:
    """The sidecar's JSON text (also the Parquet key-value entry)."""
    return json.dumps(data, indent=1) + "\n"


def write_sidecar(trace_path, data: dict) -> str:
    """Write ``data`` as the sidecar of ``trace_path`` (through the write-then-rename helper)."""
    path = meta_path(trace_path)
    write_text(path, meta_text(data), "the trace metadata")
    return path


def read_meta(csv_path) -> dict | None:
    """The sidecar of trace ``csv_path`` as a dict; for a Parquet trace without
    one, the copy in its key-value metadata; None when there is neither."""
    path = meta_path(csv_path)
    try:
        with open(path, encoding="utf-8") as fh:
            text = fh.read()
    except FileNotFoundError:
        text = _parquet_meta(csv_path)
        if text is None:
            return None
        path = os.fspath(csv_path)
    except OSError as exc:
        raise InputError(path, None, f"cannot read file: {exc.strerror}") from None
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise InputError(path, exc.lineno, f"malformed JSON: {exc.msg}") from None
    if not isinstance(data, dict):
        raise InputError(path, 1, "expected a JSON object")
    every = data.get("every", 1)
    if not isinstance(every, int) or isinstance(every, bool) or every < 1:
        raise InputError(path, None, f"'every' must be a whole number >= 1, got {every!r}")
    return data


def _parquet_meta(trace_path) -> str | None:
    """The ``trundle`` key-value entry of a Parquet trace, or None."""
    try:
        with open(trace_path, "rb") as fh:
            if fh.read(4) != b"PAR1":
                return None
    except OSError:
        return None
    import polars as pl
    try:
        return pl.read_parquet_metadata(os.fspath(trace_path)).get(PARQUET_KEY)
    except Exception:                                   # noqa: BLE001 - an unreadable file has none
        return None


def provenance_notes(meta: dict | None, scen, every: int) -> list:
    """Why a run may differ from a recorded trace: one line per mismatch.

    Compares the recorded scenario/robot hashes, step, decimation and
    version with those of ``scen``.
    """
    from sim import __version__

    if meta is None:
        return ["the baseline has no metadata (no .meta.json beside it); cannot say what produced it"]
    notes = []
    name = os.path.basename(scen.source)
    other_scenario = meta.get("scenario") not in (None, name)
    if other_scenario:
        notes.append(f"likely cause: the baseline was recorded from another scenario, "
                     f"'{meta.get('scenario')}' (this run is '{name}')")
    elif meta.get("scenario_hash") != scen.scenario_hash:
        notes.append(f"likely cause: the scenario file changed since the baseline was recorded "
                     f"(hash {meta.get('scenario_hash')} then, {scen.scenario_hash} now)")
    if meta.get("robot") not in (None, scen.robot.name):
        notes.append(f"{'' if other_scenario else 'likely cause: '}the baseline was recorded with another robot, "
                     f"'{meta.get('robot')}' (this run drives '{scen.robot.name}')")
    elif meta.get("robot_hash") != scen.robot_hash:
        notes.append(f"{'' if other_scenario else 'likely cause: '}the robot changed since the baseline "
                     f"was recorded (hash {meta.get('robot_hash')} then, {scen.robot_hash} now)")
    if meta.get("step") != scen.step:
        notes.append(f"the baseline was recorded with step {meta.get('step')} s, the run uses {scen.step:g} s")
    if meta.get("every", 1) != every:
        notes.append(f"the baseline keeps every {meta.get('every', 1)} rows, the run every {every}")
    if meta.get("trundle") != __version__:
        notes.append(f"the baseline was recorded by trundle {meta.get('trundle')}, this is {__version__}")
    if meta.get("complete") is False:
        notes.append("the baseline run was interrupted (incomplete trace)")
    return notes
