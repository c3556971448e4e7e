"""``trundle serve SCENARIO.yaml``: drive a scenario's base from another process over TCP."""
from __future__ import annotations

NAME = "serve"
HELP = "serve a scenario over TCP: a controller in any language drives the base (JSON lines)"


def add_arguments(p):
    p.add_argument("scenario", help="scenario file (YAML); its script, if any, is not used")
    p.add_argument("--listen", default="127.0.0.1:0", metavar="HOST:PORT",
                   help="where to listen (default 127.0.0.1:0: this machine only, a free port; "
                        "the first line printed says where)")
    p.add_argument("--realtime", action="store_true",
                   help="step at wall-clock rate (default: lockstep, time advances only when the client asks)")
    p.add_argument("--watchdog", type=float, metavar="S",
                   help="with --realtime: command a stop when no command came for S s of run time "
                        "(default 0.25)")
    p.add_argument("--csv", metavar="PATH", help="write the trace as CSV")


def run(args) -> int:
    import math
    import os

    from sim.errors import InputError
    from sim.files.scenario import load_scenario
    from sim.runs.runner import summary_text
    from sim.runs.serve import DEFAULT_WATCHDOG, parse_listen, serve

    host, port = parse_listen(args.listen)
    watchdog = DEFAULT_WATCHDOG
    if args.watchdog is not None:
        if not args.realtime:
            raise InputError("--watchdog", None, "applies to --realtime only (in lockstep the base does not "
                                                 "move while the client is silent)")
        if not (math.isfinite(args.watchdog) and args.watchdog > 0):
            raise InputError("--watchdog", None, f"must be a time > 0 s, got {args.watchdog:g}")
        watchdog = args.watchdog
    if args.csv:
        d = os.path.dirname(os.path.abspath(args.csv))
        if not os.path.isdir(d):
            raise InputError("--csv", None, f"directory '{os.path.dirname(args.csv) or '.'}' does not exist")
    scen = load_scenario(args.scenario)
    from sim.cli.options import print_warnings
    print_warnings(scen)
    res, driver = serve(scen, host, port, realtime=args.realtime, watchdog=watchdog, csv=args.csv)
    print(summary_text(res))
    for line in driver.summary_lines():
        print(line)
    if scen.script:
        print("note      the scenario's script was not used: the client commanded the base")
    if args.csv:
        print(f"trace     {args.csv} ({res.rows} rows)")
    if res.interrupted:
        return 130
    return 0 if res.passed else 1
