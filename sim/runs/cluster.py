"""Send ``trundle batch`` work units to a Dask cluster (optional, extra ``[cluster]``).

The units are the same plain function calls the local process pool runs
(:func:`sim.batch.run_one`); results come back as the same dicts, placed in
unit order, so the table, JUnit file and exit code do not depend on where the
work ran.  Scenario files, robot files and the baselines folder must be at the
same paths on every worker (a shared file system), because workers read and,
with ``--update``, write them.
"""
from __future__ import annotations

from sim.errors import InputError


def run_units_dask(units, address, baselines_dir=None, update=False, tol=None, rules=(),
                   on_done=None, work=None) -> list:
    """Run every unit on the Dask scheduler at ``address``; results in unit order."""
    from functools import partial

    from sim.runs.batch import died, run_one
    from sim.traces.tolerance import DEFAULT_TOLERANCE
    tol = DEFAULT_TOLERANCE if tol is None else tol
    units = list(units)
    results = [None] * len(units)
    call = partial(_unit, work or run_one, baselines_dir, update, tol, list(rules))

    def done(i, r):
        results[i] = r
        if on_done:
            on_done(i, r)

    map_dask(call, [(u.path, u.rel) for u in units], address, done,
             lambda i, exc: died(units[i].path, f"the work unit failed on the cluster: {exc!r}"))
    return results


def _unit(work, baselines_dir, update, tol, rules, path_rel):
    path, rel = path_rel
    return work(path, baselines_dir, update, rel=rel, tol=tol, rules=rules)


def map_dask(fn, args, address, on_result, on_error, name="trundle") -> None:
    """Run ``fn(a)`` for every ``a`` in ``args`` on the Dask scheduler at ``address``.

    ``on_result(index, value)`` as results arrive (any order); a call that fails on the
    cluster gives ``on_result(index, on_error(index, exc))``.  Used by design studies,
    whose units are not scenario files.
    """
    try:
        from distributed import Client, as_completed
    except ImportError:
        raise InputError("--scheduler", None,
                         "needs dask.distributed: pip install 'trundle[cluster]'") from None
    try:
        client = Client(address, timeout="10s", set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        raise InputError("--scheduler", None, f"cannot reach the Dask scheduler at {address}: {exc}") from None
    import uuid
    tag = uuid.uuid4().hex[:8]  # keys unique to this call, whoever else uses the scheduler
    try:
        futs = {client.submit(fn, a, pure=False, key=f"{name}-{tag}-{i}"): i for i, a in enumerate(args)}
        with client.as_current():
            for f in as_completed(list(futs)):
                i = futs[f]
                try:
                    r = f.result()
                except Exception as exc:                     # noqa: BLE001 - a unit's crash is its result
                    r = on_error(i, exc)
                on_result(i, r)
    finally:
        client.close()
