"""``trundle batch PATHS...``: run many scenarios in parallel, with checks and baselines."""
from __future__ import annotations

import math
import os
import sys

NAME = "batch"
HELP = "run every scenario found in files or folders (checks, baselines, JUnit XML)"


def add_arguments(p):
    p.add_argument("paths", nargs="+", metavar="PATH", help="scenario files or folders (searched recursively)")
    p.add_argument("--baselines", metavar="DIR",
                   help="compare each run with DIR/<scenario path>.csv (exit 1 on divergence)")
    p.add_argument("--update", action="store_true", help="with --baselines: rewrite the baselines instead")
    p.add_argument("--jobs", type=int, default=None, metavar="N",
                   help="worker processes (default: all cores; 1 runs in this process)")
    p.add_argument("--junit", metavar="FILE", help="also write the results as JUnit XML")
    p.add_argument("--timeout", type=float, default=600.0, metavar="S",
                   help="time limit per scenario in s (default 600; 0: none); a scenario that runs "
                        "longer is stopped and reported as timed out")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="send the runs to a Dask scheduler (e.g. tcp://10.0.0.5:8786; extra [cluster])")
    from sim.cli.options import add_tolerance_arguments
    add_tolerance_arguments(p)


class _Progress:
    """A bar on a terminal, one plain line per scenario otherwise (on stderr)."""

    def __init__(self, units, stream=None):
        self.units = units
        self.n = len(units)
        self.done = 0
        self.stream = stream or sys.stderr
        self.tty = self.stream.isatty()

    def end_line(self):
        """Finish a bar cut short, so that what follows starts on its own line."""
        if self.tty and 0 < self.done < self.n:
            self.stream.write("\n")
            self.stream.flush()

    def __call__(self, i, r):
        self.done += 1
        s = self.stream
        if self.tty:
            width = 30
            fill = width * self.done // self.n
            s.write(f"\r[{'#' * fill}{'.' * (width - fill)}] {self.done}/{self.n} "
                    f"{r['result']:<12} {r['scenario'][-40:]:<40}")
            if self.done == self.n:
                s.write("\n")
        else:
            s.write(f"[{self.done:>{len(str(self.n))}}/{self.n}] {r['result']:<12} "
                    f"{r['wall']:6.2f} s  {r['scenario']}\n")
        s.flush()


def run(args) -> int:
    from sim.runs.batch import (check_baseline_names, details, find_scenarios, prepare_parent, run_units, table,
                         write_junit)
    from sim.errors import InputError
    from sim.traces.tolerance import parse_tolerances

    if args.update and not args.baselines:
        raise InputError("--update", None, "needs --baselines DIR (the folder of baseline traces to rewrite)")
    from sim.procs import cores
    jobs = cores() if args.jobs is None else args.jobs
    if jobs < 1:
        raise InputError("--jobs", None, f"must be a whole number >= 1, got {jobs}")
    if not (args.timeout >= 0 and math.isfinite(args.timeout)):
        raise InputError("--timeout", None, f"must be a number of seconds >= 0 (0: no limit), got {args.timeout:g}")
    if args.junit:
        from sim.files.atomic import check_target
        check_target(args.junit, "the JUnit report")
    prepare_parent(1 if args.scheduler else jobs)
    tol, rules = parse_tolerances(args.tol)
    if args.baselines and not args.update and not os.path.isdir(args.baselines):
        raise InputError(args.baselines, None, "baselines folder not found (record baselines with --update)")
    units = find_scenarios(args.paths)
    if args.baselines:
        check_baseline_names(units, args.baselines)
    if args.scheduler:
        from sim.runs.cluster import run_units_dask
        results = run_units_dask(units, args.scheduler, args.baselines, args.update, tol, rules,
                                 on_done=_Progress(units))
    else:
        progress = _Progress(units)
        try:
            results = run_units(units, args.baselines, args.update, jobs, tol, rules, on_done=progress,
                                timeout=args.timeout or None)
        except KeyboardInterrupt:
            progress.end_line()
            raise
    seen = set()
    for r in results:
        for w in r.get("warnings", ()):
            if w not in seen:
                seen.add(w)
                print(w, file=sys.stderr)
    print(table(results, update=args.update))
    why = details(results)
    if why:
        print(why)
    if args.junit:
        write_junit(args.junit, results)
    return 0 if all(r["result"] == "pass" for r in results) else 1
