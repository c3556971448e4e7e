"""``trundle plot TRACE.csv -o OUT.png [--compare OTHER.csv]``: plot a trace."""
from __future__ import annotations

NAME = "plot"
HELP = "plot a trace: path with heading and ICR, twist, wheel spin and steer, slip"


def add_arguments(p):
    p.add_argument("trace", help="trace CSV (from trundle run --csv or trundle drive --record)")
    p.add_argument("-o", "--output", metavar="OUT.png", required=True, help="PNG file to write")
    p.add_argument("--compare", metavar="OTHER.csv", help="overlay a second trace (dotted)")


def run(args) -> int:
    from sim.errors import require
    require("matplotlib", "trundle plot")
    from sim.view.plot import plot_traces, unshown_wheels

    _, traces = plot_traces(args.trace, args.output, compare=args.compare)
    for tr in traces:
        thin = f", 1 row in {tr.stride} plotted" if tr.stride > 1 else ""
        print(f"trace     {tr.path} ({tr.rows} rows{thin}); peak slip {tr.peak_slip:.4g} m/s at t={tr.peak_t:g} s")
    dropped = unshown_wheels(traces)
    if dropped:
        print(f"note      wheels of {traces[1].label} not drawn (not in {traces[0].label}): {', '.join(dropped)}")
    print(f"plot      {args.output}")
    return 0
