"""Batch runs: find scenarios, run them in worker processes, collect results.

Which files are scenarios
-------------------------
A path given on the command line is taken as a scenario whatever it holds.
In a folder (searched recursively, in sorted order) a scenario is a
``.yaml``/``.yml`` file whose top level is a mapping with a ``robot``,
``script`` or ``commands`` key; folders named ``robots`` and hidden folders
are skipped, and so are YAML files without those keys (robot files have
``wheels``).  A YAML file that does not parse is listed anyway, so that it
shows up as an input error instead of vanishing.

The work unit
-------------
:func:`run_one` ``(path, baselines_dir, update) -> dict`` is a plain,
picklable module-level function returning a plain dict (str, float, bool,
list), so any executor (a process pool, a cluster) can run the same units.
It never raises for a bad or crashing scenario: the outcome is in
``result``: ``pass`` | ``check failed`` | ``diverged`` | ``input error`` |
``crashed``.

Results come back in the order of the units, whatever the number of jobs
or the order of completion; each baseline file is written by its own unit.
"""
from __future__ import annotations

import multiprocessing
import os
import re
import time
import traceback
from concurrent.futures import ProcessPoolExecutor, as_completed
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass

from .errors import InputError
from .tracediff import DEFAULT_TOLERANCE

RESULTS = ("pass", "check failed", "diverged", "input error", "crashed")
SCENARIO_KEYS = ("robot", "script", "commands")
SKIP_DIRS = ("robots",)
YAML_SUFFIXES = (".yaml", ".yml")


@dataclass(frozen=True)
class Unit:
    """One scenario to run: ``path`` as found, ``rel`` its name below the given folder."""

    path: str
    rel: str


# -- finding scenarios -------------------------------------------------------------
_TOP_KEY = re.compile(r"^(?:%s)\s*:" % "|".join(SCENARIO_KEYS), re.M)


def looks_like_scenario(path) -> bool:
    """Whether a YAML file found in a folder is a scenario (see module docstring).

    A line starting with a scenario key settles it without parsing (the worker
    parses the file anyway, and reports it if it is malformed); other files
    are parsed, so that a malformed one is still listed as an input error.
    """
    from .yamlread import load_file

    try:
        with open(path, "rb") as fh:
            head = fh.read(1 << 16).decode("utf-8", "replace")
    except OSError:
        return True
    if _TOP_KEY.search(head):
        return True
    try:
        data = load_file(path)
    except InputError:
        return True
    return isinstance(data, dict) and any(k in data for k in SCENARIO_KEYS)


def find_scenarios(paths) -> list:
    """Units for ``paths`` (files or folders), in argument order then sorted by name.

    Raises InputError for a path that does not exist or when nothing is found.
    """
    units, seen = [], set()
    for p in paths:
        p = os.fspath(p)
        if os.path.isfile(p):
            found = [Unit(p, os.path.basename(p))]
        elif os.path.isdir(p):
            found = []
            for root, dirs, files in os.walk(p):
                dirs[:] = sorted(d for d in dirs if d not in SKIP_DIRS and not d.startswith("."))
                for f in sorted(files):
                    full = os.path.join(root, f)
                    if f.lower().endswith(YAML_SUFFIXES) and looks_like_scenario(full):
                        found.append(Unit(full, os.path.relpath(full, p)))
        else:
            raise InputError(p, None, "no such file or folder")
        for u in found:
            key = os.path.realpath(u.path)
            if key not in seen:
                seen.add(key)
                units.append(u)
    if not units:
        raise InputError(", ".join(map(os.fspath, paths)) or "batch", None,
                         "found no scenarios (YAML files with a robot, script or commands key)")
    return units


def baseline_path(baselines_dir, rel) -> str:
    """``DIR/<rel without extension>.csv``."""
    return os.path.join(baselines_dir, os.path.splitext(rel)[0] + ".csv")


def check_baseline_names(units, baselines_dir) -> None:
    """Two scenarios must not share one baseline file."""
    owner = {}
    for u in units:
        b = os.path.normcase(baseline_path(baselines_dir, u.rel))
        if b in owner:
            raise InputError(u.path, None, f"has the same baseline name as {owner[b]} ({b}); "
                                           "run them in separate batches or rename one")
        owner[b] = u.path


# -- the work unit -------------------------------------------------------------
def run_one(path, baselines_dir, update, rel=None, tol=DEFAULT_TOLERANCE, rules=()) -> dict:
    """Run one scenario; return its outcome as a plain dict (never raises for the scenario).

    Keys: ``scenario`` (path), ``result`` (one of :data:`RESULTS`), ``wall``
    (s), ``peak_slip`` (m/s or None), ``first_divergence`` (short text),
    ``baseline`` (path or None), ``change`` (``new`` | ``changed`` |
    ``metadata`` | ``unchanged`` | None), ``details`` (list of lines explaining a non-pass).
    """
    t0 = time.perf_counter()
    out = {"scenario": os.fspath(path), "result": "crashed", "wall": 0.0, "peak_slip": None,
           "first_divergence": "", "baseline": None, "change": None, "details": []}
    try:
        _run_one(out, os.fspath(path), baselines_dir, update, rel, tol, list(rules))
    except InputError as exc:
        out["result"] = "input error"
        out["details"] = [str(exc)]
    except Exception:                                   # noqa: BLE001 - one crash must not stop the batch
        out["result"] = "crashed"
        out["details"] = traceback.format_exc().rstrip().splitlines()
    out["wall"] = time.perf_counter() - t0
    return out


def _run_one(out, path, baselines_dir, update, rel, tol, rules):
    from .baseline import record, run_against
    from .runner import run_scenario
    from .scenario import load_scenario

    scen = load_scenario(path)
    rep = None
    if baselines_dir is None:
        res = run_scenario(scen)
    else:
        bpath = baseline_path(baselines_dir, rel or os.path.basename(path))
        out["baseline"] = bpath
        if update:
            res, change, old = record(scen, bpath, tol, rules)
            out["change"] = change
            if old is not None:
                out["first_divergence"] = "diverged " + old.summary() if old.diverged else old.status
        else:
            res, rep, notes = run_against(scen, bpath, tol, rules)
    if res.interrupted:
        raise KeyboardInterrupt
    out["peak_slip"] = float(res.peak_slip)
    failed = [f"FAIL {c.text}" + (f" (line {c.line})" if c.line else "") for c in res.checks if not c.passed]
    diverged = rep is not None and rep.diverged
    if diverged:
        out["first_divergence"] = rep.summary()
    if failed:
        out["result"] = "check failed"
        out["details"] += failed
    elif diverged:
        out["result"] = "diverged"
    else:
        out["result"] = "pass"
    if diverged:
        out["details"] += rep.text("baseline", "run").splitlines() + [f"note {n}" for n in notes]


# -- running many --------------------------------------------------------------
def pool_context():
    """Start method for worker processes: ``forkserver`` where there is one, else ``spawn``.

    Not ``fork``: forking a process that runs threads can deadlock.  The fork
    server imports the engine once, so each worker starts with numpy and
    Trundle already loaded.
    """
    methods = multiprocessing.get_all_start_methods()
    if "forkserver" in methods:
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(["numpy", "yaml", "sim.batch", "sim.runner", "sim.baseline"])
        return ctx
    return multiprocessing.get_context("spawn")


def _died(path, why) -> dict:
    return {"scenario": path, "result": "crashed", "wall": 0.0, "peak_slip": None,
            "first_divergence": "", "baseline": None, "change": None, "details": [why]}


def run_units(units, baselines_dir=None, update=False, jobs=1, tol=DEFAULT_TOLERANCE, rules=(),
              on_done=None, work=run_one) -> list:
    """Run ``work`` for every unit; return the result dicts in unit order.

    ``jobs`` 1 runs in this process; more uses a process pool.  A worker
    process that dies takes only its own scenario with it: the others are
    run again, one pool each, and the one that dies is marked crashed.
    ``on_done(index, result)`` is called as results arrive (any order).
    """
    units = list(units)
    results = [None] * len(units)

    def call(i):
        u = units[i]
        return (u.path, baselines_dir, update), {"rel": u.rel, "tol": tol, "rules": list(rules)}

    def done(i, r):
        results[i] = r
        if on_done:
            on_done(i, r)

    if jobs <= 1 or len(units) <= 1:
        for i in range(len(units)):
            a, kw = call(i)
            done(i, work(*a, **kw))
        return results
    ctx = pool_context()
    broken = False
    with ProcessPoolExecutor(max_workers=min(jobs, len(units)), mp_context=ctx) as ex:
        futs = {}
        for i in range(len(units)):
            a, kw = call(i)
            futs[ex.submit(work, *a, **kw)] = i
        try:
            for f in as_completed(futs):
                try:
                    r = f.result()
                except BrokenProcessPool:
                    broken = True
                    continue
                except Exception as exc:                     # noqa: BLE001
                    r = _died(units[futs[f]].path, f"the work unit failed: {exc!r}")
                done(futs[f], r)
        except KeyboardInterrupt:
            ex.shutdown(wait=False, cancel_futures=True)
            raise
    if broken:
        for i in [i for i in range(len(units)) if results[i] is None]:
            a, kw = call(i)
            with ProcessPoolExecutor(max_workers=1, mp_context=ctx) as one:
                try:
                    r = one.submit(work, *a, **kw).result()
                except BrokenProcessPool:
                    r = _died(units[i].path, "the worker process died while running this scenario")
            done(i, r)
    return results


# -- reporting -----------------------------------------------------------------
def table(results, update=False) -> str:
    """The final table: scenario, result, wall time, peak slip, first divergence / baseline."""
    last = "baseline" if update else "first divergence"
    w = max([len("scenario")] + [len(r["scenario"]) for r in results])
    lines = [f"{'scenario':<{w}}  {'result':<12}  {'wall s':>7}  {'peak slip m/s':>13}  {last}"]
    for r in results:
        slip = "-" if r["peak_slip"] is None else f"{r['peak_slip']:.3g}"
        tail = r["first_divergence"]
        if update and r["change"]:
            tail = {"metadata": "metadata only"}.get(r["change"], r["change"]) + (f", {tail}" if tail else "")
        lines.append(f"{r['scenario']:<{w}}  {r['result']:<12}  {r['wall']:>7.2f}  {slip:>13}  {tail}".rstrip())
    counts = [f"{sum(r['result'] == k for r in results)} {k}" for k in RESULTS
              if any(r["result"] == k for r in results)]
    lines.append(f"{len(results)} scenario{'s' if len(results) != 1 else ''}: {', '.join(counts)}")
    if update:
        kinds = {"new": "new", "changed": "changed", "metadata": "metadata only", "unchanged": "unchanged"}
        ch = {k: [r for r in results if r["change"] == k] for k in kinds}
        parts = [f"{len(v)} {kinds[k]}" for k, v in ch.items() if v]
        if parts:
            lines.append("baselines: " + ", ".join(parts))
        for r in ch["new"] + ch["changed"] + ch["metadata"]:
            lines.append(f"  {kinds[r['change']]:<13} {r['baseline']}")
    return "\n".join(lines)


def details(results) -> str:
    """Why each scenario that did not pass failed (blank when all passed)."""
    out = []
    for r in results:
        if r["result"] != "pass" and r["details"]:
            out.append(f"--- {r['scenario']}: {r['result']}")
            out += ["    " + d for d in r["details"]]
    return "\n".join(out)


def write_junit(path, results, suite="trundle batch") -> None:
    """JUnit XML: one testsuite, one testcase per scenario; ``failure`` for check
    failed / diverged, ``error`` for input error / crashed (common practice)."""
    import xml.etree.ElementTree as ET

    failures = sum(r["result"] in ("check failed", "diverged") for r in results)
    errors = sum(r["result"] in ("input error", "crashed") for r in results)
    total = sum(r["wall"] for r in results)
    root = ET.Element("testsuites", name=suite, tests=str(len(results)), failures=str(failures),
                      errors=str(errors), time=f"{total:.3f}")
    ts = ET.SubElement(root, "testsuite", name=suite, tests=str(len(results)), failures=str(failures),
                       errors=str(errors), skipped="0", time=f"{total:.3f}")
    for r in results:
        folder, name = os.path.split(r["scenario"])
        tc = ET.SubElement(ts, "testcase", classname=folder.replace(os.sep, ".") or "scenarios",
                           name=name, time=f"{r['wall']:.3f}")
        if r["result"] == "pass":
            continue
        tag = "failure" if r["result"] in ("check failed", "diverged") else "error"
        first = r["first_divergence"] or (r["details"][0] if r["details"] else r["result"])
        el = ET.SubElement(tc, tag, message=f"{r['result']}: {first}", type=r["result"])
        el.text = "\n".join(r["details"])
    ET.indent(root)
    path = os.fspath(path)
    part = path + ".part"
    with open(part, "wb") as fh:
        ET.ElementTree(root).write(fh, encoding="utf-8", xml_declaration=True)
        fh.write(b"\n")
    os.replace(part, path)
