"""Text for people: the maneuverability report and matrix listings."""
from __future__ import annotations

import math
from collections import Counter

import numpy as np

from sim.theory.analysis import Analysis


def analysis_text(robot, A: Analysis) -> str:
    counts = Counter(w.type for w in robot.wheels)
    mix = ", ".join(f"{n} {t}" for t, n in counts.items())
    L = [f"{robot.name}  ({robot.source}; {len(robot.wheels)} wheels: {mix})", ""]
    L.append(f"  mobility         {A.mobility}   body motions free at fixed steering")
    L.append(f"  steerability     {A.steerability}   steering freedoms usable independently")
    L.append(f"  maneuverability  {A.maneuverability}   mobility + steerability")
    omni = "omnidirectional" if A.omnidirectional else "not omnidirectional"
    L.append(f"  class            {A.kind} ({A.mobility}, {A.steerability}); {omni}")
    L += ["", "ICR", f"  {A.icr['text']}"]
    L += ["", "Drive"]
    L.append(f"  driven wheels    {', '.join(A.driven) or 'none'}")
    if A.redundant:
        L.append(f"  redundant        {', '.join(A.redundant)}: their spins follow from the others; "
                 "any other command makes the base skid")
        for r in A.relations:
            L.append(f"      {r}   (spins, rad/s)")
        if not A.relations:
            L.append("      (the relation between spins changes with the steering)")
    else:
        L.append("  redundant        none: every driven wheel commands its own motion")
    if A.uncontrolled:
        for u in A.uncontrolled:
            L.append(f"  uncontrolled     {u['text']}: no driven wheel produces or resists it")
    else:
        L.append("  uncontrolled     none: the driven wheels control every motion the base can make")
    if A.generic_steer:
        ang = ", ".join(f"{k} {math.degrees(v):.1f} deg" for k, v in A.generic_steer.items())
        L.append(f"  (degrees computed at a generic steering that lets the base move: {ang};")
        L.append("   steering limits are not considered here, see the singularities)")
    L += ["", "Steering singularities"]
    L += [f"  - {s}" for s in A.singularities] or ["  none"]
    if A.warnings:
        L += ["", "Warnings"] + [f"  - {w}" for w in A.warnings]
    return "\n".join(L)


def matrix_text(name: str, M, rows=None, cols=("vx", "vy", "omega")) -> str:
    M = np.atleast_2d(np.asarray(M, dtype=float))
    if M.size == 0:
        return f"{name}: (no rows)"
    rows = list(rows) if rows is not None else [str(i) for i in range(M.shape[0])]
    w = max(len(r) for r in rows)
    cw = max([12] + [len(c) + 2 for c in cols])
    out = [f"{name}:", " " * (w + 2) + "".join(f"{c:>{cw}}" for c in cols)]
    for r, vals in zip(rows, M):
        out.append(f"  {r:<{w}}" + "".join(f"{v + 0.0:{cw}.6f}" for v in vals))
    return "\n".join(out)


def matrices_text(robot, mats, heading) -> str:
    s = mats["stack"]
    ang = ", ".join(f"{w.name} {math.degrees(h):.2f} deg" for w, h in zip(robot.wheels, heading)
                    if w.type in ("steered", "castor"))
    L = [f"{robot.name}: matrices at wheel headings{': ' + ang if ang else ' (no steering)'}",
         "rows act on the body twist (vx m/s, vy m/s, omega rad/s)", ""]
    from sim.theory.analysis import rank
    from sim.theory.kinematics import twist_scale
    if len(s.C1) and rank(s.C1 * twist_scale(robot)) == 3:
        L += ["warning: at these headings the fixed and steered wheels' axles do not meet in one point:",
              "         no body motion is free of sideways slip (the forward matrix is a least-squares compromise)", ""]
    L.append(matrix_text("J1f  rolling rows, driven wheels of fixed angle", s.J1f, s.J1f_names))
    L.append(matrix_text("J1s  rolling rows, driven wheels of variable angle", s.J1s, s.J1s_names))
    L.append(matrix_text("C1f  no-sliding rows, fixed wheels", s.C1f, s.C1f_names))
    L.append(matrix_text("C1s  no-sliding rows, steered wheels", s.C1s, s.C1s_names))
    L.append(matrix_text("C1c  no-sliding rows, castors: C1c xi + C2 hdot = 0 (hdot: steering rate, rad/s)",
                         s.C1c, s.C1c_names))
    if len(s.C2):
        L.append("C2   minus the castor trails (m): " + ", ".join(f"{n} {v:g}" for n, v in zip(s.C1c_names, s.C2)))
    L.append("J2   r cos(roller) of driven wheels (m): "
             + (", ".join(f"{n} {v:.6g}" for n, v in zip(s.driven_names, s.J2)) or "none"))
    L.append("")
    L.append(matrix_text("forward  twist = F spin (least squares; columns: driven wheels, per rad/s)",
                         mats["forward"], ("vx", "vy", "omega"), cols=mats["driven"]))
    L.append(matrix_text("inverse  spin = K twist", mats["inverse"], mats["driven"]))
    return "\n".join(L)
