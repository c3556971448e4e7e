"""Trace metadata: the sidecar ``PATH.meta.json`` written beside every CSV trace.

The CSV stays plain RFC 4180 (ordinary CSV readers load it); what produced it
lives beside it::

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

SUFFIX = ".meta.json"


def meta_path(csv_path) -> str:
    """``PATH.meta.json`` for trace ``PATH``."""
    return os.fspath(csv_path) + SUFFIX


def write_meta(csv_path, scen, columns, every: int, rows: int, complete: bool = True) -> str:
    """Write the sidecar of trace ``csv_path`` (through ``.part``); return its path."""
    from sim import __version__

    data = {
        "trundle": __version__,
        "scenario": os.path.basename(scen.source),
        "scenario_hash": scen.scenario_hash,
        "robot": scen.robot.name,
        "robot_hash": scen.robot_hash,
        "step": scen.step,
        "every": int(every),
        "rows": int(rows),
        "complete": bool(complete),
        "columns": list(columns),
    }
    path = meta_path(csv_path)
    part = path + ".part"
    with open(part, "w", encoding="utf-8", newline="\n") as fh:
        fh.write(json.dumps(data, indent=1) + "\n")
    os.replace(part, path)
    return path


def read_meta(csv_path) -> dict | None:
    """The sidecar of ``csv_path`` as a dict, or None when there is none."""
    path = meta_path(csv_path)
    try:
        with open(path, encoding="utf-8") as fh:
            text = fh.read()
    except FileNotFoundError:
        return None
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
