"""``trundle diff A B``: compare two traces (CSV or Parquet) column by column, at equal times."""
from __future__ import annotations

from sim.cli.options import add_tolerance_arguments

NAME = "diff"
HELP = "compare two traces (CSV or Parquet) at equal times with tolerances (exit 0 within tolerance, 1 diverged)"


def add_arguments(p):
    p.add_argument("a", metavar="A", help="reference trace (.csv or .parquet)")
    p.add_argument("b", metavar="B", help="trace compared against A")
    add_tolerance_arguments(p)
    p.add_argument("--columns", metavar="A,B,...",
                   help="compare only these columns (names or shell patterns such as '*.steer')")
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.add_argument("--jobs", type=int, default=None, metavar="N",
                   help="threads for reading the traces (default: all cores)")


def run(args) -> int:
    import json
    import os
    import sys

    from sim.traces.tolerance import parse_tolerances

    if args.jobs is not None:
        if args.jobs < 1:
            from sim.errors import InputError
            raise InputError("--jobs", None, f"must be a whole number >= 1, got {args.jobs}")
        if "polars" not in sys.modules:            # polars sizes its thread pool when first imported
            os.environ["POLARS_MAX_THREADS"] = str(args.jobs)
    from sim.traces.diff import compare

    tol, rules = parse_tolerances(args.tol)
    cols = [c.strip() for c in args.columns.split(",") if c.strip()] if args.columns else None
    rep = compare(args.a, args.b, tol, rules, cols)
    if args.json:
        print(json.dumps(rep.to_dict(), indent=2, allow_nan=False))
    else:
        print(rep.text())
    return 1 if rep.diverged else 0
