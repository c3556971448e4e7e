"""Text for people: ``trundle route``'s comparison of bases on one route."""
from __future__ import annotations

import math

FOLLOWS = {"free": "any heading", "line": "faces its path", "none": "-"}


def _s(v, nd=2):
    return "-" if v is None or not math.isfinite(v) else f"{v:.{nd}f}"


def route_text(route, plans) -> str:
    """The header, a table side by side, then each base's legs and stops.  Times in s."""
    corners = "sharp corners" if route.corner_radius == 0 else f"corners rounded to {route.corner_radius:g} m"
    cap = f", speed cap {route.speed:g} m/s" if math.isfinite(route.speed) else ""
    L = [f"route     {route.name} ({route.source}): {len(route.waypoints)} waypoints, {route.length:.3f} m, "
         f"{corners}{cap}", ""]
    w = max([len(p.robot) for p in plans] + [5])
    k = max([len(p.motion.kind_text) for p in plans] + [5])
    head = (f"{'robot':<{w}}  {'class':<{k}}  {'follows':<14}  {'feasible':<8}  {'time s':>8}  "
            f"{'driving':>8}  {'turning':>8}  {'re-steer':>8}  {'peak wheel rad/s':>16}")
    L += [head, "-" * len(head)]
    for p in plans:
        peak = max(p.peak_spin.values()) if p.peak_spin else math.nan
        ok = p.feasible
        L.append(f"{p.robot:<{w}}  {p.motion.kind_text:<{k}}  {FOLLOWS[p.motion.kind]:<14}  "
                 f"{'yes' if ok else 'NO':<8}  {_s(p.time):>8}  {_s(p.drive_time if ok else None):>8}  "
                 f"{_s(p.turn_time if ok else None):>8}  {_s(p.resteer_time if ok else None):>8}  "
                 f"{_s(peak if ok else None, 1):>16}")
    feas = [p for p in plans if p.feasible]
    if len(feas) > 1:
        best = min(feas, key=lambda p: p.time)
        others = ", ".join(f"{p.robot} +{p.time - best.time:.2f} s" for p in feas if p is not best)
        L += ["", f"fastest   {best.robot} ({best.time:.3f} s); {others}"]
    for p in plans:
        L += ["", f"{p.robot}"]
        if not p.feasible:
            where = f" (waypoint {p.waypoint})" if p.waypoint is not None else ""
            L.append(f"  not feasible{where}: {p.reason}")
            continue
        events = [(s["waypoint"], "stop", s) for s in p.stops] + [(leg["from"], "leg", leg) for leg in p.legs]
        events.sort(key=lambda e: (e[0], e[1] != "stop"))
        for wp, kind, e in events:
            if kind == "leg":
                L.append(f"  leg {e['from']} -> {e['to']:<3} {e['length']:8.3f} m  {e['time']:7.3f} s   "
                         f"limited by {e['limit']}")
            else:
                parts = []
                if e["turn_time"]:
                    parts.append(f"turn in place {math.degrees(e['turn']):+.0f} deg {e['turn_time']:.3f} s")
                if e["resteer_time"]:
                    parts.append(f"re-steer {e['resteer_time']:.3f} s")
                what = ", ".join(parts) if parts else "stop (the direction of travel jumps)"
                lim = f"   ({e['limit']})" if parts and e["limit"] else ""
                L.append(f"  at waypoint {wp:<3} {what}{lim}")
        spins = ", ".join(f"{n} {v:.2f}" for n, v in p.peak_spin.items())
        L.append(f"  peak wheel speeds (rad/s): {spins}")
    return "\n".join(L)
