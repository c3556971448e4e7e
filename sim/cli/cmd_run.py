"""``trundle run SCENARIO.yaml``: run a scenario headless (CSV trace, checks)."""
from __future__ import annotations


NAME = "run"
HELP = "run a scenario: summary, checks, optional CSV trace"


def add_arguments(p):
    p.add_argument("scenario", help="scenario file (YAML)")
    p.add_argument("--csv", metavar="PATH", help="write the trace there: CSV, or Parquet when PATH ends in .parquet")
    p.add_argument("--every", type=int, default=1, metavar="N", help="keep every N-th row in the CSV")
    p.add_argument("--json", action="store_true",
                   help="print the summary as one JSON object (checks, measured values, peak slip, final pose, "
                        "the engine's decisions) instead of text")
    p.add_argument("--controller", metavar="package.module:Name",
                   help="a Python controller commands the base instead of the script: an object (or a class "
                        "made with no arguments) with command(observation); the module is looked for in "
                        "the current folder and on the Python path")
    p.add_argument("--baseline", metavar="PATH",
                   help="compare the trace with a recorded one (exit 1 when they diverge)")
    from sim.cli.options import add_tolerance_arguments
    add_tolerance_arguments(p)
    p.add_argument("--window", action="store_true",
                   help="watch the run in a window in real time (h in the window lists the keys)")
    p.add_argument("--png", metavar="PATH", help="write the final frame as a PNG (no display needed)")
    p.add_argument("--at", type=float, metavar="T",
                   help="with --png: picture the run at time T s (the step nearest T) instead of its end")
    p.add_argument("--frames", metavar="DIR", help="write numbered PNG frames into DIR")
    p.add_argument("--fps", type=float, default=30.0, metavar="N",
                   help="frames per second of run time for --frames (default 30)")


def run(args) -> int:
    from sim.errors import InputError
    from sim.runs.runner import run_scenario, summary_text
    from sim.files.scenario import load_scenario

    if args.every < 1:
        raise InputError("--every", None, f"must be a whole number >= 1, got {args.every}")
    if args.png and not str(args.png).lower().endswith(".png"):
        raise InputError("--png", None, f"the picture is a PNG file: give a path ending in .png, got {args.png!r}")
    if args.window or args.png or args.frames:
        from sim.errors import require
        require("pygame", "--window/--png/--frames")
    scen = load_scenario(args.scenario)
    from sim.cli.options import print_warnings
    print_warnings(scen)
    if args.at is not None and not args.png:
        raise InputError("--at", None, "needs --png PATH (the picture of the run at that time)")
    controller = None
    if args.controller:
        if args.window or args.png or args.frames:
            raise InputError("--controller", None, "cannot be combined with --window, --png or --frames")
        from sim.runs.control import load_controller
        controller = load_controller(args.controller)
    if args.csv:
        from sim.files.atomic import check_target
        from sim.traces.meta import meta_path
        check_target(args.csv, "the trace")
        check_target(meta_path(args.csv), "the trace's sidecar")
    if args.baseline:
        return _run_baseline(args, scen, controller)
    if args.window or args.png or args.frames:
        from sim.view.playback import at_step, view_run
        res = _writing(args, lambda: view_run(scen, csv=args.csv, every=args.every, window=args.window,
                                              png=args.png, frames=args.frames, fps=args.fps, at=args.at))
    else:
        res = _writing(args, lambda: run_scenario(scen, csv=args.csv, every=args.every, controller=controller))
    if args.json:
        from sim.runs.summary import summary_dict
        d = summary_dict(res, scen.warnings)
        if args.png:
            d["picture"] = {"path": args.png, "t": at_step(scen, args.at) * scen.step if args.at is not None else None}
        if args.frames:
            d["frames"] = {"folder": args.frames, "fps": args.fps}
        if args.csv:
            d["trace"] = {"path": args.csv, "every": args.every}
        _print_json(d)
    else:
        print(summary_text(res))
        if controller is not None and scen.script:
            print("note      the scenario's script was not used: the controller commanded the base")
        _floor_note(scen)
        if args.png:
            print(f"picture   {args.png}" + (f" (at t = {at_step(scen, args.at) * scen.step:g} s)"
                                             if args.at is not None else ""))
        if args.frames:
            print(f"frames    {args.frames}/ at {args.fps:g} per second of run time")
        if args.csv:
            print(f"trace     {args.csv} ({res.rows if args.every == 1 else 'every ' + str(args.every) + ' of ' + str(res.rows)} rows)")
    if res.interrupted:
        return 130
    return 0 if res.passed else 1


def _writing(args, work):
    """``work()``; an OSError while the trace streams (a full disk) is ``CSV: cannot write the trace``."""
    from sim.errors import InputError
    try:
        return work()
    except OSError as exc:
        if not args.csv:
            raise
        raise InputError(args.csv, None, f"cannot write the trace: {exc.strerror or exc}") from None


def _floor_note(scen) -> None:
    """Say how to measure clearance when the scenario has a floor but no check uses it."""
    if scen.floor is not None and not any(c.kind in ("clearance_above", "no_contact") for c in scen.checks):
        print(f"floor     {len(scen.floor)} features; add a check 'no_contact: true' or "
              "'clearance_above: D' to measure the clearance (--png draws it)")


def _run_baseline(args, scen, controller=None) -> int:
    """``--baseline``: run (to a temporary CSV unless --csv), compare, report."""
    from sim.runs.baseline import run_against
    from sim.runs.runner import summary_text
    from sim.traces.tolerance import parse_tolerances

    tol, rules = parse_tolerances(args.tol)
    res, rep, notes = _writing(args, lambda: run_against(scen, args.baseline, tol, rules, csv=args.csv,
                                                         every=None if args.every == 1 else args.every,
                                                         controller=controller))
    if args.json:
        from sim.runs.summary import summary_dict
        d = summary_dict(res, scen.warnings)
        d["baseline"] = {"path": args.baseline, "status": rep.status, "diverged": bool(rep.diverged),
                         "first_divergence": rep.summary() if rep.diverged else None, "notes": list(notes)}
        d["passed"] = d["passed"] and not rep.diverged
        _print_json(d)
    else:
        print(summary_text(res))
        _floor_note(scen)
        print(rep.text("baseline", "run"))
        for n in notes:
            print(f"note      {n}")
    if res.interrupted:
        return 130
    return 0 if res.passed and not rep.diverged else 1


def _print_json(d) -> None:
    import json
    print(json.dumps(d, indent=2, allow_nan=False))
