"""``trundle analyze ROBOT.yaml``: what a wheel layout can do."""
from __future__ import annotations

import json
import os
import sys

NAME = "analyze"
HELP = "degrees of mobility, steerability and maneuverability, ICR locus, redundancy, matrices"


def add_arguments(p):
    p.add_argument("robot", help="robot description (YAML)")
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.add_argument("--matrices", action="store_true",
                   help="print J1, C1, J2 and the forward and inverse matrices")
    p.add_argument("--steer", action="append", default=[], metavar="NAME=ANGLE",
                   help="steering angle for --matrices/--export, e.g. front=20deg (repeatable)")
    p.add_argument("--export", choices=("c",), help="write the matrices as a C header")
    p.add_argument("-o", "--output", help="file for --export (default: stdout)")


def _steer(args, robot):
    from sim.files import fields as F
    from sim.errors import InputError
    out = {}
    for item in args.steer:
        name, eq, val = item.partition("=")
        if not eq:
            raise InputError("--steer", None, f"expected NAME=ANGLE, got '{item}'")
        if name not in robot.index:
            raise InputError("--steer", None, f"no wheel named '{name}'{F.suggest(name, robot.index)}")
        if robot.wheel(name).type not in ("steered", "castor"):
            raise InputError("--steer", None, f"wheel '{name}' is {robot.wheel(name).type}; only steered and castor wheels take an angle")
        val = val.replace("deg", " deg").replace("rad", " rad")
        out[name] = F.angle(val, F.Where("--steer", name))
    return out


def run(args) -> int:
    from sim.theory.analysis import analyze, matrices
    from sim.theory.constraints import angles_with
    from sim.view.report import analysis_text, matrices_text
    from sim.files.robotfile import load_robot

    from sim.cli.options import print_warnings

    robot = load_robot(args.robot)
    print_warnings(robot)
    heading = angles_with(robot, _steer(args, robot))
    if args.export:
        from sim.files.cexport import c_header
        text = c_header(robot, matrices(robot, heading), heading, os.path.basename(args.robot))
        if args.output:
            from sim.files.atomic import write_text
            write_text(args.output, text, "the C header")
            print(f"wrote {args.output}")
        else:
            sys.stdout.write(text)
        return 0
    A = analyze(robot)
    if args.json:
        d = A.as_dict()
        if args.matrices:
            m = matrices(robot, heading)
            s = m["stack"]
            d["matrices"] = {k: getattr(s, k).tolist() for k in ("J1f", "J1s", "C1f", "C1s", "C1c", "C2", "J2")}
            d["matrices"]["forward"] = m["forward"].tolist()
            d["matrices"]["inverse"] = m["inverse"].tolist()
            d["matrices"]["driven"] = m["driven"]
        print(json.dumps(d, indent=2))
        return 0
    print(analysis_text(robot, A))
    if args.matrices:
        print()
        print(matrices_text(robot, matrices(robot, heading), heading))
    return 0
