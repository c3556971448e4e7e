"""``trundle plot TRACE.csv -o OUT.png [--compare OTHER.csv]``: plot a trace."""
from __future__ import annotations

NAME = "plot"
HELP = "plot a trace: path with heading and ICR, twist, wheel spin and steer, slip"


def add_arguments(p):
    p.add_argument("trace", help="trace, CSV or Parquet (from trundle run --csv or trundle drive --record)")
    p.add_argument("-o", "--output", metavar="OUT.png", required=True, help="PNG file to write")
    p.add_argument("--compare", metavar="OTHER", help="overlay a second trace (dotted)")
    p.add_argument("--floor", metavar="FLOOR",
                   help="draw a floor (GeoJSON or YAML) with the swept area and the closest approach "
                        "of the first trace (needs --robot for the footprint)")
    p.add_argument("--robot", metavar="ROBOT.yaml", help="the first trace's robot file (its footprint)")


def run(args) -> int:
    from sim.errors import require
    require("matplotlib", "trundle plot")
    from sim.errors import InputError
    from sim.view.plot import plot_traces, unshown_wheels

    floor = outline = None
    if args.floor or args.robot:
        if not (args.floor and args.robot):
            raise InputError("--floor" if args.floor else "--robot", None,
                             "--floor and --robot go together: the floor, and the robot whose footprint is checked")
        from sim.files.floorfile import load_floor
        from sim.files.robotfile import load_robot
        outline = load_robot(args.robot).outline
        floor = load_floor(args.floor)
    _, traces = plot_traces(args.trace, args.output, compare=args.compare, floor=floor, outline=outline)
    for tr in traces:
        thin = f", 1 row in {tr.stride} plotted" if tr.stride > 1 else ""
        print(f"trace     {tr.path} ({tr.rows} rows{thin}); peak slip {tr.peak_slip:.4g} m/s at t={tr.peak_t:g} s")
    if traces[0].clearance is not None:
        for ln in traces[0].clearance.lines():
            print(f"floor     {ln}")
    dropped = unshown_wheels(traces)
    if dropped:
        print(f"note      wheels of {traces[1].label} not drawn (not in {traces[0].label}): {', '.join(dropped)}")
    print(f"plot      {args.output}")
    return 0
