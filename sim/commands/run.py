"""``trundle run SCENARIO.yaml``: run a scenario headless (CSV trace, checks)."""
from __future__ import annotations

import sys

NAME = "run"
HELP = "run a scenario: summary, checks, optional CSV trace"


def add_arguments(p):
    p.add_argument("scenario", help="scenario file (YAML)")
    p.add_argument("--csv", metavar="PATH", help="write the trace as CSV")
    p.add_argument("--every", type=int, default=1, metavar="N", help="keep every N-th row in the CSV")


def run(args) -> int:
    from ..errors import InputError
    from ..runner import run_scenario, summary_text
    from ..scenario import load_scenario

    if args.every < 1:
        raise InputError("--every", None, f"must be a whole number >= 1, got {args.every}")
    scen = load_scenario(args.scenario)
    res = run_scenario(scen, csv=args.csv, every=args.every)
    print(summary_text(res))
    if args.csv:
        print(f"trace     {args.csv} ({res.rows if args.every == 1 else 'every ' + str(args.every) + ' of ' + str(res.rows)} rows)")
    if res.interrupted:
        return 130
    return 0 if res.passed else 1
