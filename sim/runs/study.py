"""Design studies: build every variant of a base, measure it on routes and scenarios, gather one row each.

The design
----------
Parameters with ``values`` (or a ``range`` with a ``count``) form a full grid, the first
parameter varying slowest.  Parameters with ``samples: N`` together draw N points of one
Latin hypercube over their ranges (McKay, Beckman & Conover, Technometrics 1979): each
range cut into N equal strata, one point in each stratum of every parameter, the strata
paired at random (seeded, numpy's PCG64).  The grid is crossed with those N points.

The work unit
-------------
:func:`run_variant` ``(spec) -> dict`` is a plain, picklable module-level function of a
plain tuple (the robot file, the overrides, the routes, the scenarios, the figures), so a
local process pool and a Dask cluster run the same units.  In the worker the robot file
is read once, a copy gets the variant's numbers and is validated as any robot file; each
route is planned (:func:`sim.theory.speedplan.plan_route`) and each scenario is read with
its ``robot`` replaced by the variant and run (:func:`sim.runs.runner.run_scenario`).
It never raises for a variant: the outcome is in ``status``:

* ``ok`` -- every route is feasible and every scenario ran;

* ``invalid`` -- the robot file's validation refuses the variant (``reason`` says why);
* ``infeasible`` -- a route plan is infeasible, or a scenario refuses the variant (say its
  route); the other figures are still measured;
* ``crashed`` -- anything else (a bug: ``reason`` holds the exception).

The smallest clearance is that of the variant's footprint (``Robot.outline``) at every row
of its planned motion along a route with a floor (:func:`sim.runs.clearance.clearance_along`,
as ``trundle route --floor``); 0 means contact.

The cache
---------
Each row is stored under the sha256 of the study's inputs (the bytes of the robot,
route, floor and scenario files and the files a scenario names, the figures, this
format's version) and the variant's overrides.  The cache is one JSON file, rewritten
through :mod:`sim.files.atomic` every couple of seconds and when the study stops
(finished or interrupted), so a rerun computes only the variants it does not hold.
"""
from __future__ import annotations

import copy
import functools
import hashlib
import itertools
import json
import math
import os
import time
import traceback
from dataclasses import dataclass

import numpy as np

from sim.errors import InputError
from sim.files.studyfile import FIGURES, figure_of

STATUSES = ("ok", "infeasible", "invalid", "crashed")   # best first
CACHE_FORMAT = 1
SAVE_EVERY = 2.0          # s between rewrites of the cache file while a study runs


# -- the design ----------------------------------------------------------------------
def design(study) -> list:
    """Parameter values (SI) of every variant, a tuple per variant in parameter order."""
    grid = [p for p in study.parameters if p.values is not None]
    sampled = [p for p in study.parameters if p.samples is not None]
    points = [()]
    if sampled:
        points = latin_hypercube([(p.low, p.high) for p in sampled], sampled[0].samples, study.seed)
    out = []
    for g in itertools.product(*(p.values for p in grid)):
        for pt in points:
            gi, si = iter(g), iter(pt)
            out.append(tuple(float(next(si)) if p.samples is not None else float(next(gi))
                             for p in study.parameters))
    return out


def latin_hypercube(bounds, n: int, seed: int) -> list:
    """``n`` points (tuples) in the box ``bounds`` [(low, high), ...]: one point in each of
    the ``n`` equal strata of every coordinate (Latin hypercube sampling, McKay et al. 1979)."""
    rng = np.random.Generator(np.random.PCG64(seed))
    cols = []
    for lo, hi in bounds:
        u = (rng.permutation(n) + rng.random(n)) / n
        cols.append(lo + u * (hi - lo))
    return [tuple(float(c[i]) for c in cols) for i in range(n)]


def overrides(study, values) -> list:
    """``(wheel index or None, key, value)`` for one variant."""
    out = []
    for p, v in zip(study.parameters, values):
        out += p.overrides(v)
    return out


def variant_key(study, ovr) -> str:
    """Content hash of one variant and everything it is measured with."""
    h = hashlib.sha256(f"{CACHE_FORMAT}\0{study.digest}\0".encode())
    h.update(json.dumps(ovr).encode())
    return h.hexdigest()


def spec(study, ovr) -> tuple:
    """The plain, picklable description of one unit of work (:func:`run_variant`)."""
    return (study.robot_path, tuple(tuple(o) for o in ovr),
            tuple((r.path, r.name, r.floor) for r in study.routes),
            tuple((s.path, s.name) for s in study.scenarios),
            tuple(study.figures), study.digest)


# -- the work unit -------------------------------------------------------------------
@functools.lru_cache(maxsize=32)
def _yaml(path, digest):
    from sim.files.yamlread import load_file
    return load_file(path)


@functools.lru_cache(maxsize=32)
def _route(path, digest):
    from sim.files.routefile import load_route
    return load_route(path)


@functools.lru_cache(maxsize=32)
def _floor(path, digest):
    from sim.files.floorfile import load_floor
    return load_floor(path)


@functools.lru_cache(maxsize=32)
def _scenario_hash(path, digest):
    with open(path, "rb") as fh:
        return hashlib.sha256(fh.read()).hexdigest()[:16]


def variant_data(robot_data, ovr):
    """A copy of the robot file's mapping (line numbers kept) with the overrides in place."""
    data = copy.deepcopy(robot_data)
    for i, key, value in ovr:
        if i is None:
            fp = data.get("footprint")
            if not isinstance(fp, dict):
                from sim.files.yamlread import Map
                fp = Map()
                fp.line, fp.lines = data.line, {}
                data["footprint"] = fp
                data.lines["footprint"] = data.line
                fp.update({"length": 0.6, "width": 0.4})  # the robot file's defaults
            fp[key] = value
            fp.lines.setdefault(key, fp.line)
        else:
            w = data["wheels"][i]
            w[key] = [-value, value] if key == "steer_limits" else value
            w.lines.setdefault(key, w.line)
    return data


def run_variant(unit) -> dict:
    """Measure one variant (module docstring); a dict of figure columns, ``status``, ``reason``."""
    try:
        return _run_variant(*unit)
    except KeyboardInterrupt:
        raise
    except Exception:                                       # noqa: BLE001 - one variant must not stop a study
        return {"status": "crashed", "reason": traceback.format_exc().strip().splitlines()[-1]}


def _run_variant(robot_path, ovr, routes, scenarios, figures, digest) -> dict:
    from sim.files.robotfile import robot_from_data

    out = {}
    many_routes, many_scens = len(routes) > 1, len(scenarios) > 1
    data = variant_data(_yaml(robot_path, digest), ovr)
    try:
        robot = robot_from_data(data, robot_path)
    except InputError as exc:
        return {"status": "invalid", "reason": str(exc)}
    status, reasons = "ok", []
    if routes:
        from sim.theory.speedplan import plan_route
        floored = [r for r in routes if r[2]]
        for path, name, floor in routes:
            sfx = f"@{name}" if many_routes else ""
            plan = plan_route(robot, _route(path, digest))
            ok = plan.feasible
            if not ok:
                status = "infeasible"
                reasons.append(f"route {name}: {plan.reason}")
            if "route_time" in figures:
                out["route_time" + sfx] = float(plan.time) if ok else None
            if "resteer_time" in figures:
                out["resteer_time" + sfx] = float(plan.resteer_time) if ok else None
            if "smallest_clearance" in figures and floor:
                c = None
                if ok:
                    from sim.runs.clearance import clearance_along
                    near = clearance_along(robot.outline, plan.pose, _floor(floor, digest), t=plan.t).nearest
                    c = None if near is None else float(near.distance)
                out["smallest_clearance" + (f"@{name}" if len(floored) > 1 else "")] = c
    for path, name in scenarios:
        sfx = f"@{name}" if many_scens else ""
        figs = {"peak_slip": None, "odometry_error": None, "checks_failed": None}
        try:
            res = _run_scenario(path, data, digest)
        except InputError as exc:
            status = "infeasible" if status == "ok" else status
            reasons.append(f"scenario {name}: {exc}")
            res = None
        if res is not None:
            figs["peak_slip"] = float(res.peak_slip)
            if res.odometry:
                figs["odometry_error"] = float(res.odometry["final_position_error"])
            figs["checks_failed"] = sum(not c.passed for c in res.checks)
        for f in ("peak_slip", "odometry_error", "checks"):
            if f in figures:
                col = FIGURES[f][0]
                out[col + sfx] = figs[col]
    out["status"] = status
    out["reason"] = "; ".join(reasons)
    return out


def _run_scenario(path, robot_data, digest):
    from sim.files.scenario import scenario_from_data
    from sim.files.yamlread import Map
    from sim.runs.runner import run_scenario

    base = _yaml(path, digest)
    data = Map(base)
    data.line, data.lines = base.line, dict(base.lines)
    data["robot"] = robot_data
    scen = scenario_from_data(data, path, _scenario_hash(path, digest))
    res = run_scenario(scen)
    if res.interrupted:
        raise KeyboardInterrupt
    return res


def run_chunk(units) -> list:
    """:func:`run_variant` for several units (one message each way for a few variants)."""
    return [run_variant(u) for u in units]


# -- running a study -----------------------------------------------------------------
@dataclass
class StudyRun:
    """What :func:`run_study` produced: ``rows`` one dict per variant in design order
    (``variant`` 1-based, the parameters, the figure columns, ``status``, ``reason``);
    ``ran`` variants computed now, ``cached`` taken from the cache."""

    study: object
    columns: list
    rows: list
    ran: int
    cached: int


def default_cache(study, output=None) -> str:
    """``RESULTS.cache.json`` beside the results, else ``STUDY.cache.json`` beside the study."""
    base = output if output else study.source
    return os.path.splitext(base)[0] + ".cache.json"


def read_cache(path) -> dict:
    """Rows by variant key from a cache file ({} when there is none or it is not ours)."""
    if not path or not os.path.isfile(path):
        return {}
    try:
        with open(path, encoding="utf-8") as fh:
            d = json.load(fh)
    except (OSError, ValueError):
        return {}
    if not isinstance(d, dict) or d.get("format") != CACHE_FORMAT or not isinstance(d.get("rows"), dict):
        return {}
    return d["rows"]


def write_cache(path, rows: dict) -> None:
    from sim.files.atomic import write_text
    write_text(path, json.dumps({"format": CACHE_FORMAT, "rows": rows}, sort_keys=True) + "\n", "the study cache")


def run_study(study, jobs: int = 1, scheduler: str | None = None, cache: str | None = None,
              on_done=None, on_start=None) -> StudyRun:
    """Run every variant not in the cache; return all rows in design order.

    jobs : worker processes (1: in this process).  scheduler : a Dask scheduler address
    instead.  cache : the cache file (None: no cache).  on_start(todo, total) once,
    on_done(done, todo, row) per variant computed (any order).
    """
    variants = design(study)
    ovrs = [overrides(study, v) for v in variants]
    keys = [variant_key(study, o) for o in ovrs]
    store = read_cache(cache)
    todo = [i for i, k in enumerate(keys) if k not in store]
    todo = list(dict.fromkeys(todo))
    if on_start:
        on_start(len(todo), len(keys))
    results = {}
    last_save = [time.monotonic()]
    done_n = [0]

    def done(i, r):
        results[i] = r
        store[keys[i]] = r
        done_n[0] += 1
        if cache and time.monotonic() - last_save[0] > SAVE_EVERY:
            write_cache(cache, store)
            last_save[0] = time.monotonic()
        if on_done:
            on_done(done_n[0], len(todo), r)

    units = [spec(study, ovrs[i]) for i in todo]
    try:
        if scheduler:
            _run_dask(units, todo, scheduler, jobs, done)
        elif jobs <= 1 or len(units) <= 1:
            for i, u in zip(todo, units):
                done(i, run_variant(u))
        else:
            _run_pool(units, todo, jobs, done)
    finally:
        if cache and results:
            write_cache(cache, store)
    columns = ["variant"] + [p.name for p in study.parameters] + study.columns() + ["status", "reason"]
    rows = []
    for n, (vals, k) in enumerate(zip(variants, keys)):
        r = store[k]
        row = {"variant": n + 1}
        row.update({p.name: v for p, v in zip(study.parameters, vals)})
        for c in columns[len(study.parameters) + 1:]:
            row[c] = r.get(c)
        rows.append(row)
    return StudyRun(study, columns, rows, len(results), len(keys) - len(results))


def _chunks(units, todo, jobs):
    size = max(1, min(16, len(units) // (jobs * 8)))
    for a in range(0, len(units), size):
        yield todo[a:a + size], units[a:a + size]


def _ignore_sigint():
    import signal
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the parent's to handle


def _run_pool(units, todo, jobs, done) -> None:
    """Local worker processes (:mod:`concurrent.futures` with the batch's start method)."""
    from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait

    from sim.runs.batch import worker_context
    ctx = worker_context()
    if ctx.get_start_method() == "fork":
        # the first variant runs here: it loads the compiled engine (numba's disk cache) once,
        # and the forked workers start with it in place instead of each loading it again
        done(todo[0], run_variant(units[0]))
        units, todo = units[1:], todo[1:]
        if not units:
            return
    ex = ProcessPoolExecutor(max_workers=min(jobs, len(units)), mp_context=ctx,
                             initializer=_ignore_sigint)
    ok = False
    try:
        pending = {ex.submit(run_chunk, u): idx for idx, u in _chunks(units, todo, jobs)}
        while pending:
            finished, _ = wait(list(pending), return_when=FIRST_COMPLETED)
            for f in finished:
                idx = pending.pop(f)
                try:
                    rs = f.result()
                except Exception as exc:                        # noqa: BLE001 - a dead worker's units
                    rs = [{"status": "crashed", "reason": f"the worker process failed: {exc!r}"}] * len(idx)
                for i, r in zip(idx, rs):
                    done(i, r)
        ok = True
    finally:
        ex.shutdown(wait=ok, cancel_futures=True)
        if not ok:
            for p in list(getattr(ex, "_processes", {}).values()):
                p.terminate()


def _run_dask(units, todo, address, jobs, done) -> None:
    from sim.runs.cluster import map_dask
    chunks = list(_chunks(units, todo, max(jobs, 2)))
    map_dask(run_chunk, [u for _, u in chunks],
             address, lambda j, rs: [done(i, r) for i, r in zip(chunks[j][0], rs)],
             lambda j, exc: [{"status": "crashed", "reason": f"the work unit failed on the cluster: {exc!r}"}]
             * len(chunks[j][0]), name="trundle-study")


# -- summaries -----------------------------------------------------------------------
def _good(v) -> bool:
    return v is not None and isinstance(v, (int, float)) and math.isfinite(v)


def sort_rows(rows, column) -> list:
    """Rows best first by ``column`` (its figure's better direction); ok rows with a value
    first, then the rest in variant order."""
    _, _, better = figure_of(column)
    sign = 1.0 if better == "low" else -1.0
    have = [r for r in rows if r["status"] == "ok" and _good(r.get(column))]
    rest = [r for r in rows if r not in have]
    return sorted(have, key=lambda r: (sign * r[column], r["variant"])) + rest


def pareto(rows, a, b) -> list:
    """The ok rows no other ok row beats on both ``a`` and ``b`` (each in its better
    direction; ties kept), sorted by ``a``."""
    sa = 1.0 if figure_of(a)[2] == "low" else -1.0
    sb = 1.0 if figure_of(b)[2] == "low" else -1.0
    pts = [(sa * r[a], sb * r[b], r) for r in rows if r["status"] == "ok" and _good(r.get(a)) and _good(r.get(b))]
    front = []
    for x, y, r in pts:
        if not any((x2 <= x and y2 <= y) and (x2 < x or y2 < y) for x2, y2, _ in pts):
            front.append((x, y, r))
    return [r for _, _, r in sorted(front, key=lambda t: (t[0], t[1], t[2]["variant"]))]


def figure_columns(run) -> list:
    return [c for c in run.columns if c not in ("variant", "status", "reason")
            and c not in {p.name for p in run.study.parameters}]


def resolve_column(run, name: str, what: str) -> str:
    """A figure column from a user's name: the column itself, or a figure name when it
    maps to one column (``checks`` -> ``checks_failed``)."""
    cols = figure_columns(run)
    if name in cols:
        return name
    base = FIGURES.get(name, (name,))[0]
    matches = [c for c in cols if c.split("@", 1)[0] == base]
    if len(matches) == 1:
        return matches[0]
    if matches:
        raise InputError(what, None, f"'{name}' is measured on several runs; name one of: {', '.join(matches)}")
    raise InputError(what, None, f"the study has no figure '{name}'; its figures: {', '.join(cols)}")


def write_results(path, run) -> None:
    """The table as Parquet (``.parquet``) or CSV (``.csv``), one row per variant."""
    import io

    import polars as pl

    from sim.files.atomic import write_bytes
    schema = {}
    for c in run.columns:
        if c == "variant" or c == "checks_failed" or c.startswith("checks_failed@"):
            schema[c] = pl.Int64
        elif c in ("status", "reason"):
            schema[c] = pl.Utf8
        else:
            schema[c] = pl.Float64
    df = pl.DataFrame({c: [r[c] for r in run.rows] for c in run.columns}, schema=schema)
    buf = io.BytesIO()
    if path.lower().endswith(".csv"):
        df.write_csv(buf)
    else:
        df.write_parquet(buf, statistics=False)
    write_bytes(path, buf.getvalue(), "the study results")


def results_kind(path) -> None:
    """Refuse an output name that is neither .parquet nor .csv (before anything runs)."""
    if not path.lower().endswith((".parquet", ".csv")):
        raise InputError(path, None, "the results file must end in .parquet or .csv")


def text_table(run, sort: str, limit: int = 20, pareto_cols=None) -> str:
    """The table sorted by ``sort`` (best first, at most ``limit`` rows), the best variant,
    the counts of each status, and the Pareto front of ``pareto_cols`` when given."""
    params = [p.name for p in run.study.parameters]
    figs = figure_columns(run)
    rows = sort_rows(run.rows, sort)
    shown = rows[:limit]

    def fmt(v):
        if v is None:
            return "-"
        if isinstance(v, int):
            return str(v)
        return f"{v:.4g}"

    head = ["variant"] + params + figs + ["status"]
    cells = [[str(r["variant"])] + [fmt(r[c]) for c in params + figs] + [r["status"]] for r in shown]
    widths = [max([len(h)] + [len(c[j]) for c in cells]) for j, h in enumerate(head)]
    L = [f"study     {run.study.source}: {len(run.rows)} variants ({run.ran} run now, {run.cached} from the cache); "
         f"sorted by {sort} ({'lowest' if figure_of(sort)[2] == 'low' else 'highest'} first)", ""]
    line = "  ".join(h.rjust(w) if j < len(head) - 1 else h for j, (h, w) in enumerate(zip(head, widths)))
    L += [line, "-" * len(line)]
    for c in cells:
        L.append("  ".join(x.rjust(w) if j < len(head) - 1 else x for j, (x, w) in enumerate(zip(c, widths))))
    if len(rows) > limit:
        L.append(f"... {len(rows) - limit} more variants")
    counts = ", ".join(f"{sum(r['status'] == s for r in run.rows)} {s}" for s in STATUSES
                       if any(r["status"] == s for r in run.rows))
    L += ["", f"status    {counts}"]
    best = [r for r in rows if r["status"] == "ok" and _good(r.get(sort))]
    if best:
        b = best[0]
        unit = figure_of(sort)[1]
        L.append(f"best      variant {b['variant']}: " + ", ".join(f"{p} {fmt(b[p])}" for p in params)
                 + f" -> {sort} {fmt(b[sort])}{(' ' + unit) if unit else ''}")
    if pareto_cols:
        a, c = pareto_cols
        front = pareto(run.rows, a, c)
        L.append(f"pareto    {a} against {c}: {len(front)} variant{'s' if len(front) != 1 else ''} no other beats "
                 "on both")
        for r in front:
            L.append(f"          variant {r['variant']}: {a} {fmt(r[a])}, {c} {fmt(r[c])}  ("
                     + ", ".join(f"{p} {fmt(r[p])}" for p in params) + ")")
    bad = [r for r in run.rows if r["status"] != "ok"]
    for r in bad[:5]:
        L.append(f"variant {r['variant']} {r['status']}: {r['reason']}")
    if len(bad) > 5:
        L.append(f"... and {len(bad) - 5} more variants not ok (see the results file)")
    return "\n".join(L)
