"""Baselines: run a scenario against a recorded trace, or record one.

A baseline is an ordinary trace (CSV, or Parquet) plus its sidecar
``.meta.json`` (:mod:`sim.traces.meta`).  :func:`run_against` runs the
scenario with the baseline's decimation (``every`` in the sidecar), compares
the new trace with :func:`sim.traces.diff.compare` and, when they diverge,
says what changed in between (scenario or robot content, step, version).
:func:`record` writes a baseline only when the new run differs from the old
one beyond the tolerance, or its metadata changed (so a refresh never
commits rounding noise), and says which.

Baselines are kept small: a run of more than ``MAX_ROWS`` steps keeps every
N-th row, N = ceil(steps / MAX_ROWS) (the last row always).
"""
from __future__ import annotations

import filecmp
import math
import os
import shutil
import signal
import tempfile

from sim.errors import InputError
from sim.files.atomic import check_target, signals_held
from sim.runs.runner import run_scenario
from sim.traces.diff import compare
from sim.traces.meta import meta_path, provenance_notes, read_meta
from sim.traces.tolerance import DEFAULT_TOLERANCE

MAX_ROWS = 2000


def baseline_every(scen) -> int:
    """Decimation used when recording a baseline of ``scen``."""
    return max(1, math.ceil(scen.steps / MAX_ROWS))


def missing_message() -> str:
    """What to say when a baseline file is not there."""
    return "baseline not found (record one with 'trundle batch --update' or 'trundle run --csv')"


def run_against(scen, baseline, tol=DEFAULT_TOLERANCE, rules=(), csv=None, every=None, controller=None):
    """Run ``scen`` and compare its trace with ``baseline``.

    Returns ``(run_result, diff_report, notes)``; ``notes`` (list of str) name
    the likely causes of a divergence.  The trace goes to ``csv`` if given,
    else to a temporary file that is removed.  ``every`` defaults to the
    baseline's.  ``controller``: as for :func:`~sim.runs.runner.run_scenario`.
    """
    baseline = os.fspath(baseline)
    if not os.path.isfile(baseline):
        raise InputError(baseline, None, missing_message())
    meta = read_meta(baseline)
    if every is None:
        every = meta.get("every", 1) if meta else 1
    tmp = None
    if csv is None:
        tmp = tempfile.mkdtemp(prefix="trundle-")
        csv = os.path.join(tmp, "run.csv")
    try:
        res = run_scenario(scen, csv=csv, every=every, controller=controller)
        rep = compare(baseline, csv, tol, rules)
        if tmp:
            rep.path_b = "(this run)"
    finally:
        if tmp:
            shutil.rmtree(tmp, ignore_errors=True)
    notes = provenance_notes(meta, scen, every) if rep.diverged else []
    return res, rep, notes


def record(scen, baseline, tol=DEFAULT_TOLERANCE, rules=()):
    """Record the baseline of ``scen`` at ``baseline`` (and its sidecar), when it changed.

    Returns ``(run_result, change, report)``: change is ``new``, ``changed``
    (the new run differs from the old trace beyond the tolerance, or not at
    the same rows), ``metadata`` (the trace is kept, the sidecar differs:
    say a new robot hash or version) or ``unchanged``; ``report`` compares
    the old baseline with the new run when their bytes differ (else None).
    A trace within tolerance is not rewritten.  Files are replaced
    atomically, the trace before its sidecar, with Ctrl-C held back in
    between; nothing is written when the run was interrupted (change None).
    """
    baseline = os.fspath(baseline)
    folder = os.path.dirname(os.path.abspath(baseline))
    for target in (baseline, meta_path(baseline)):
        check_target(target, "the baseline")
    try:
        os.makedirs(folder, exist_ok=True)
        tmp = tempfile.mkdtemp(prefix=".trundle-", dir=folder)
    except OSError as exc:
        raise InputError(baseline, None, f"cannot write the baseline: {exc.strerror or exc}") from None
    try:
        new = os.path.join(tmp, "new" + os.path.splitext(baseline)[1])
        res = run_scenario(scen, csv=new, every=baseline_every(scen))
        if res.interrupted:  # a cut-off run must never replace a baseline
            return res, None, None
        old_exists = os.path.isfile(baseline)
        keep_trace = old_exists and filecmp.cmp(new, baseline, shallow=False)
        report = None
        if old_exists and not keep_trace:
            try:
                report = compare(baseline, new, tol, rules)
                keep_trace = not report.diverged and report.all_matched
            except InputError:
                report = None                      # the old file was broken: just replace it
        same_meta = (keep_trace and os.path.isfile(meta_path(baseline))
                     and filecmp.cmp(meta_path(new), meta_path(baseline), shallow=False))
        # the trace and its sidecar change together (a batch's time limit, SIGALRM, waits too)
        with signals_held((signal.SIGINT, signal.SIGTERM, signal.SIGALRM)):
            try:
                if not keep_trace:
                    os.replace(new, baseline)
                if not same_meta:
                    os.replace(meta_path(new), meta_path(baseline))
            except OSError as exc:
                raise InputError(baseline, None, f"cannot write the baseline: {exc.strerror or exc}") from None
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    change = ("unchanged" if same_meta else "metadata" if keep_trace else "changed" if old_exists else "new")
    return res, change, report
