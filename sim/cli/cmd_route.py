"""``trundle route ROUTE.yaml ROBOT.yaml [ROBOT.yaml ...]``: can these bases drive a route, and how fast."""
from __future__ import annotations

NAME = "route"
HELP = "the fastest time each base can drive a route: feasible or why not, driving/turning/re-steering, limits"


def add_arguments(p):
    p.add_argument("route", help="route file (YAML)")
    p.add_argument("robots", nargs="+", metavar="ROBOT.yaml", help="robot files to compare")
    p.add_argument("--json", action="store_true", help="print one JSON object per base, as a list")
    p.add_argument("--plot", metavar="PNG", help="draw the paths and the speed profiles along the route")


def run(args) -> int:
    import json

    from sim.files.robotfile import load_robot
    from sim.files.routefile import load_route
    from sim.theory.speedplan import plan_route
    from sim.view.routereport import route_text

    route = load_route(args.route)
    robots = [load_robot(r) for r in args.robots]
    if args.plot:
        from sim.errors import require
        require("matplotlib", "--plot")
    plans = [plan_route(r, route) for r in robots]
    if args.json:
        out = []
        for r, p in zip(args.robots, plans):
            d = p.as_dict()
            d["file"] = r
            d["route"] = route.name
            out.append(d)
        print(json.dumps(out, indent=2))
    else:
        print(route_text(route, plans))
    if args.plot:
        from sim.view.routeplot import plot_route
        plot_route(args.plot, route, plans)
        if not args.json:
            print(f"\nplot      {args.plot}")
    return 0 if all(p.feasible for p in plans) else 1
