"""``trundle route ROUTE.yaml ROBOT.yaml [ROBOT.yaml ...]``: can these bases drive a route, and how fast."""
from __future__ import annotations

NAME = "route"
HELP = "the fastest time each base can drive a route: feasible or why not, driving/turning/re-steering, limits"


def add_arguments(p):
    p.add_argument("route", help="route file (YAML)")
    p.add_argument("robots", nargs="+", metavar="ROBOT.yaml", help="robot files to compare")
    p.add_argument("--json", action="store_true", help="print one JSON object per base, as a list")
    p.add_argument("--plot", metavar="PNG", help="draw the paths and the speed profiles along the route")
    p.add_argument("--floor", metavar="FILE", help="a floor (GeoJSON or YAML): report each base's smallest "
                                                   "clearance along its planned motion, and any contact")


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
    floor = None
    if args.floor:
        from sim.files.floorfile import load_floor
        floor = load_floor(args.floor)
    plans = [plan_route(r, route) for r in robots]
    clear = [_clearance(r, p, floor) if floor is not None else None for r, p in zip(robots, plans)]
    if args.json:
        out = []
        for r, p, c in zip(args.robots, plans, clear):
            d = p.as_dict()
            d["file"] = r
            d["route"] = route.name
            if floor is not None:
                d["clearance"] = c
            out.append(d)
        print(json.dumps(out, indent=2))
    else:
        print(route_text(route, plans))
        if floor is not None:
            print(f"\nclearance to {args.floor} along each planned motion (the footprint at every plan row):")
            for r, c in zip(robots, clear):
                print(f"  {r.name:<18} {_clearance_text(c)}")
    if args.plot:
        from sim.view.routeplot import plot_route
        plot_route(args.plot, route, plans)
        if not args.json:
            print(f"\nplot      {args.plot}")
    return 0 if all(p.feasible for p in plans) else 1


def _clearance(robot, plan, floor):
    """The smallest clearance of ``robot`` along ``plan`` to ``floor``, as a JSON-ready dict
    (None when the plan is infeasible): distance m, feature, t s, first contact or None."""
    if not plan.feasible or plan.pose is None:
        return None
    from sim.runs.clearance import clearance_along
    res = clearance_along(robot.outline, plan.pose, floor, t=plan.t)
    n = res.nearest
    c = res.first_contact
    return {"distance": None if n is None else n.distance, "feature": None if n is None else n.feature,
            "t": None if n is None else n.t,
            "contact": None if c is None else {"feature": c.feature, "t": c.t, "point": list(c.point)}}


def _clearance_text(c) -> str:
    if c is None:
        return "not measured (no feasible plan)"
    if c["distance"] is None:
        return "the floor has no features"
    text = f"{1000 * c['distance']:.1f} mm to '{c['feature']}' at t={c['t']:.2f} s"
    if c["contact"] is not None:
        k = c["contact"]
        text += f"; CONTACT with '{k['feature']}' from t={k['t']:.2f} s"
    return text
