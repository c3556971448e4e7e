"""Batch runs: find scenarios, run them in worker processes, collect results.

Which files are scenarios
-------------------------
A path given on the command line is taken as a scenario whatever it holds.
In a folder (searched recursively, in sorted order) a scenario is a
``.yaml``/``.yml`` file whose top level is a mapping with a ``robot``,
``script`` or ``commands`` key; folders named ``robots`` or ``studies`` and hidden folders
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
``timed out`` | ``crashed``.

Time limit
----------
:func:`run_units` gives each unit ``timeout`` seconds (``trundle batch
--timeout``, default :data:`DEFAULT_TIMEOUT`).  The process running the unit
(this one with one job, else its worker) sets an alarm (``SIGALRM``): when it
rings the unit stops as on Ctrl-C (temporary files removed, no baseline
replaced) and is reported ``timed out``.  A unit that does not stop at its
alarm (stuck where Python cannot interrupt it) has its worker process
stopped :data:`GRACE` seconds later and is reported ``timed out`` as well.
Scenarios sent to a Dask cluster are not timed: the cluster's own limits apply.

Results come back in the order of the units, whatever the number of jobs
or the order of completion; each baseline file is written by its own unit.
"""
from __future__ import annotations

import contextlib
import multiprocessing
import os
import re
import signal
import stat
import sys
import threading
import time
import traceback
from dataclasses import dataclass

from sim import procs
from sim.errors import InputError
from sim.traces.tolerance import DEFAULT_TOLERANCE

RESULTS = ("pass", "check failed", "diverged", "input error", "timed out", "crashed")
DEFAULT_TIMEOUT = 600.0   # s per scenario
GRACE = 10.0              # s after its alarm before a unit's worker process is stopped
SCENARIO_KEYS = ("robot", "script", "commands")
SKIP_DIRS = ("robots", "studies")
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
    from sim.files.yamlread import load_file

    try:
        if not stat.S_ISREG(os.stat(path).st_mode):
            return True  # a FIFO or device named *.yaml: listed, and reported as an input error
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
        if os.path.isdir(p):
            found = []
            for root, dirs, files in os.walk(p):
                dirs[:] = sorted(d for d in dirs if d not in SKIP_DIRS and not d.startswith("."))
                for f in sorted(files):
                    full = os.path.join(root, f)
                    if f.lower().endswith(YAML_SUFFIXES) and looks_like_scenario(full):
                        found.append(Unit(full, os.path.relpath(full, p)))
        elif os.path.lexists(p):  # a file (or a FIFO, a device: the unit reports it)
            found = [Unit(p, os.path.basename(p))]
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
    ``metadata`` | ``unchanged`` | None), ``details`` (list of lines explaining a non-pass),
    ``warnings`` (plausibility warnings of the scenario and its robot, ``file:line: warning: ...``).
    """
    t0 = time.perf_counter()
    out = {"scenario": os.fspath(path), "result": "crashed", "wall": 0.0, "peak_slip": None,
           "first_divergence": "", "baseline": None, "change": None, "details": [], "warnings": []}
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
    from sim.runs.runner import run_scenario
    from sim.files.scenario import load_scenario

    scen = load_scenario(path)
    out["warnings"] = [str(w) for w in scen.warnings]
    rep = None
    missing = None
    if baselines_dir is None:
        res = run_scenario(scen)
    else:
        from sim.runs.baseline import missing_message, record, run_against
        bpath = baseline_path(baselines_dir, rel or os.path.basename(path))
        out["baseline"] = bpath
        if update:
            res, change, old = record(scen, bpath, tol, rules)
            out["change"] = change
            if old is not None:
                out["first_divergence"] = "diverged " + old.summary() if old.diverged else old.status
        elif not os.path.isfile(bpath):
            # still run it: a failing check is reported beside the missing baseline
            res = run_scenario(scen)
            missing = f"{bpath}: {missing_message()}"
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
    elif missing:
        out["result"] = "input error"
    elif diverged:
        out["result"] = "diverged"
    else:
        out["result"] = "pass"
    if missing:
        out["first_divergence"] = "no baseline"
        out["details"].append(missing)
    if diverged:
        out["details"] += rep.text("baseline", "run").splitlines() + [f"note {n}" for n in notes]


# -- running many --------------------------------------------------------------
PRELOAD = ("numpy", "yaml", "sim.runs.batch", "sim.runs.runner")  # what every worker needs (sim.runs.baseline: on demand)


def pool_context():
    """:func:`sim.procs.pool_context` preloading what every worker needs."""
    return procs.pool_context(PRELOAD)


def _single_threaded() -> bool:
    """Whether this process runs exactly one thread (Linux: counted by the kernel,
    so threads started by libraries, such as numpy's BLAS pool, count too)."""
    if threading.active_count() != 1:
        return False
    try:
        with open("/proc/self/stat") as fh:
            return int(fh.read().rsplit(")", 1)[1].split()[17]) == 1
    except (OSError, ValueError, IndexError):
        return False


MATH_THREADS = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


def prepare_parent(jobs: int) -> None:
    """Get this process ready to run a batch (``trundle batch`` calls it first).

    numpy's math libraries get one thread each unless the user set any of
    :data:`MATH_THREADS`:
    a batch is parallel by processes, and the engine's 3x3 and 8x3 matrices
    gain nothing from BLAS threads (more threads per worker only crowd the
    cores; common practice).  With workers, the engine is loaded here, before
    any thread exists, so that forked workers start with it in place.
    """
    if not any(name in os.environ for name in MATH_THREADS):
        os.environ.update(dict.fromkeys(MATH_THREADS, "1"))
    if jobs > 1:
        import importlib
        for name in PRELOAD:
            importlib.import_module(name)


def worker_context():
    """Start method for :func:`run_units`' workers.

    ``fork`` when this process is single-threaded, as ``trundle batch`` is
    after :func:`prepare_parent`: the workers then start in milliseconds with
    the engine already loaded, and no server process outlives the batch.
    Otherwise :func:`pool_context`.
    """
    if "fork" in multiprocessing.get_all_start_methods() and _single_threaded():
        return multiprocessing.get_context("fork")
    return pool_context()


def died(path, why) -> dict:
    return {"scenario": path, "result": "crashed", "wall": 0.0, "peak_slip": None,
            "first_divergence": "", "baseline": None, "change": None, "details": [why], "warnings": []}


def timed_out(path, timeout, wall=None, why="") -> dict:
    """The result of a unit stopped at its time limit."""
    r = died(path, why or f"still running after {timeout:g} s (the time limit, --timeout); stopped")
    r.update(result="timed out", wall=float(timeout if wall is None else wall))
    return r


class TimeLimit(BaseException):
    """Raised in a unit when its time is up (a BaseException, so that nothing inside catches it)."""


RING_AGAIN = 1.0  # s: the alarm rings again this often until the unit stops


@contextlib.contextmanager
def time_limit(seconds):
    """Raise :class:`TimeLimit` in this thread after ``seconds`` (s; None or 0: no limit).

    Uses ``SIGALRM``, so it works in the main thread on Unix; elsewhere it does nothing.
    The alarm rings again every :data:`RING_AGAIN` s until the block ends, because an
    exception raised where Python cannot pass it on (a callback from compiled code, such
    as the JIT compiler's) is dropped.
    """
    if (not seconds or not hasattr(signal, "setitimer")
            or threading.current_thread() is not threading.main_thread()):
        yield
        return

    def ring(signum, frame):
        raise TimeLimit

    old = signal.signal(signal.SIGALRM, ring)
    signal.setitimer(signal.ITIMER_REAL, float(seconds), RING_AGAIN)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, old)


def run_limited(work, args, kw, timeout) -> dict:
    """``work(*args, **kw)`` under :func:`time_limit`; a unit out of time gives :func:`timed_out`."""
    t0 = time.perf_counter()
    try:
        with time_limit(timeout):
            return work(*args, **kw)
    except TimeLimit:
        return timed_out(args[0], timeout, time.perf_counter() - t0)


def run_units(units, baselines_dir=None, update=False, jobs=1, tol=DEFAULT_TOLERANCE, rules=(),
              on_done=None, work=run_one, timeout=DEFAULT_TIMEOUT) -> list:
    """Run ``work`` for every unit; return the result dicts in unit order.

    ``jobs`` 1 runs in this process; more uses that many worker processes
    (:func:`_run_workers`).  A worker process that dies takes only the
    scenario it was running with it: that one is marked crashed and a new
    worker takes over the rest.  Each unit gets ``timeout`` seconds (None or
    0: no limit; see the module docstring).  ``on_done(index, result)`` is
    called as results arrive (any order).
    """
    units = list(units)
    results = [None] * len(units)
    calls = [((u.path, baselines_dir, update), {"rel": u.rel, "tol": tol, "rules": list(rules)})
             for u in units]

    def done(i, r):
        results[i] = r
        if on_done:
            on_done(i, r)

    if jobs <= 1 or len(units) <= 1:
        if timeout:  # as a worker does before its first unit: the time limit is the unit's own
            import importlib
            for name in PRELOAD:
                importlib.import_module(name)
        for i, (a, kw) in enumerate(calls):
            done(i, run_limited(work, a, kw, timeout))
    else:
        _run_workers(calls, min(jobs, len(units)), work, done, timeout)
    return results


_IN_FLIGHT = 2  # units sent to a worker ahead of its results, so it never waits for this process


def _stop_unit(signum, frame):
    raise KeyboardInterrupt  # the unit stops as on Ctrl-C: no baseline replaced, temporary files removed


def _serve(conn, work, inherited=(), timeout=None):
    """Worker process: load the engine, then run ``(index, args, kwargs)`` messages
    until ``None`` or the end of the pipe, each under :func:`time_limit` ``timeout``.

    ``inherited`` (forked workers): this process's copies of the parent's pipe
    ends, closed first, so that the pipe ends when the parent does.  SIGTERM
    (the parent stopping the batch) interrupts the running unit, which cleans up.
    """
    for c in inherited:
        c.close()
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the parent's to handle
    signal.signal(signal.SIGTERM, _stop_unit)
    with procs.interrupts_kept(signal.SIGTERM):
        _serve_units(conn, work, timeout)


def _serve_units(conn, work, timeout):
    import importlib
    try:
        for name in PRELOAD:
            importlib.import_module(name)
        while True:
            try:
                msg = conn.recv()
            except (EOFError, OSError):
                return
            if msg is None:
                return
            i, args, kw = msg
            try:
                r = run_limited(work, args, kw, timeout)
            except Exception as exc:                         # noqa: BLE001 - reported, not raised
                r = died(args[0], f"the work unit failed: {exc!r}")
            try:
                conn.send((i, r))
            except OSError:
                return  # the parent is gone
    except KeyboardInterrupt:
        return


class _Worker:
    """A worker process, this end of its pipe, and the units sent to it (oldest = running)."""

    def __init__(self, ctx, work, others=(), timeout=None):
        for stream in (sys.stdout, sys.stderr):  # a forked child must not write this process's buffered text again
            if stream is not None:
                stream.flush()
        self.conn, child = ctx.Pipe()
        inherited = [self.conn, *(w.conn for w in others)] if ctx.get_start_method() == "fork" else []
        self.proc = ctx.Process(target=_serve, args=(child, work, inherited, timeout), daemon=True)
        self.proc.start()
        child.close()
        self.sent = []
        self.since = time.monotonic()  # when its oldest unit in ``sent`` started (about)

    def stop(self, hard=False):
        """Ask the worker to finish (``None``), or interrupt its unit (``hard``: SIGTERM)."""
        try:
            if hard:
                self.proc.terminate()
            else:
                self.conn.send(None)
        except OSError:
            pass
        self.conn.close()

    def join(self, wait=10.0):
        self.proc.join(wait)
        if self.proc.is_alive():  # a unit that does not stop when told
            self.proc.kill()
            self.proc.join()


def _run_workers(calls, jobs, work, done, timeout=None) -> None:
    """Hand ``calls`` to ``jobs`` worker processes, a few at a time, and collect the results.

    One loop in this process waits on the workers' pipes (no threads), so a
    unit costs one small message each way.  A pipe that ends before its
    result means the worker died while running its oldest unit.  A unit
    still running :data:`GRACE` s after its time limit has its worker stopped.
    """
    from multiprocessing.connection import wait

    ctx = worker_context()
    todo = list(range(len(calls)))[::-1]  # a stack: the next unit last
    workers = []
    limit = timeout + GRACE if timeout else None

    def feed(w):
        # one unit ahead while there is plenty left; near the end none, so no worker sits
        # on a waiting unit that an idle one could run
        depth = _IN_FLIGHT if len(todo) > len(workers) else 1
        while todo and len(w.sent) < depth:
            i = todo.pop()
            if not w.sent:
                w.since = time.monotonic()
            w.sent.append(i)
            try:
                w.conn.send((i, *calls[i]))
            except OSError:  # the worker died: wait() sees its pipe end and gives its units back
                return

    def start():
        w = _Worker(ctx, work, workers, timeout)
        workers.append(w)
        return w

    def overdue():
        """Stop the workers whose running unit is past its limit; report those units."""
        now = time.monotonic()
        for w in [w for w in workers if w.sent and now - w.since > limit]:
            i = w.sent.pop(0)
            todo.extend(w.sent[::-1])
            workers.remove(w)
            w.stop(hard=True)
            w.join(1.0)  # it ignored its alarm: do not wait long for it to take SIGTERM either
            done(i, timed_out(calls[i][0][0], timeout, now - w.since,
                              f"did not stop at its time limit of {timeout:g} s (--timeout); its worker "
                              "process was stopped"))
            if todo:
                feed(start())

    finished = False
    try:
        for _ in range(jobs):  # all of them first, so that the first does not take a second unit
            start()
        for w in workers:
            feed(w)
        while any(w.sent for w in workers):
            wait_for = None
            if limit:
                wait_for = max(0.0, min(w.since + limit for w in workers if w.sent) - time.monotonic()) + 0.05
            ready = wait([w.conn for w in workers if w.sent], wait_for)
            if not ready:
                overdue()
                continue
            for conn in ready:
                w = next(w for w in workers if w.conn is conn)
                try:
                    i, r = conn.recv()
                except Exception:                            # noqa: BLE001 - EOF or a torn message
                    i = w.sent.pop(0)
                    todo.extend(w.sent[::-1])
                    workers.remove(w)
                    w.stop(hard=True)
                    w.join()
                    done(i, died(calls[i][0][0], "the worker process died while running this scenario"))
                    if todo:
                        feed(start())
                    continue
                w.sent.remove(i)
                w.since = time.monotonic()
                done(i, r)
                feed(w)
        finished = True
    finally:
        for w in workers:
            w.stop(hard=not finished)
        for w in workers:
            w.join()


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
    errors = sum(r["result"] in ("input error", "timed out", "crashed") for r in results)
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
    from sim.files.atomic import write_bytes
    write_bytes(path, ET.tostring(root, encoding="utf-8", xml_declaration=True) + b"\n", "the JUnit report")
