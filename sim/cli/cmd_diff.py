"""``trundle diff A.csv B.csv``: compare two traces column by column."""
from __future__ import annotations

from sim.cli.options import add_tolerance_arguments

NAME = "diff"
HELP = "compare two CSV traces with tolerances (exit 0 within tolerance, 1 diverged)"


def add_arguments(p):
    p.add_argument("a", metavar="A.csv", help="reference trace")
    p.add_argument("b", metavar="B.csv", help="trace compared against A")
    add_tolerance_arguments(p)
    p.add_argument("--columns", metavar="A,B,...",
                   help="compare only these columns (names or shell patterns such as '*.steer')")
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.add_argument("--jobs", type=int, default=None, metavar="N",
                   help="worker processes for large traces (default: all cores)")


def run(args) -> int:
    import json

    from sim.traces.tolerance import parse_tolerances
    from sim.traces.diff import compare

    tol, rules = parse_tolerances(args.tol)
    cols = [c.strip() for c in args.columns.split(",") if c.strip()] if args.columns else None
    from sim.procs import cores
    jobs = cores() if args.jobs is None else args.jobs
    if jobs < 1:
        from sim.errors import InputError
        raise InputError("--jobs", None, f"must be a whole number >= 1, got {jobs}")
    rep = compare(args.a, args.b, tol, rules, cols, jobs=jobs)
    if args.json:
        print(json.dumps(rep.to_dict(), indent=2, allow_nan=False))
    else:
        print(rep.text())
    return 1 if rep.diverged else 0
