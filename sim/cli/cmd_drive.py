"""``trundle drive ROBOT.yaml [--record PATH]``: drive a base by hand in a window."""
from __future__ import annotations

NAME = "drive"
HELP = ("drive a base by hand in a window, hold to drive (keyboard, or a gamepad with an enable button held); "
        "optionally record a replayable trace")


def add_arguments(p):
    p.add_argument("robot", help="robot file (YAML)")
    p.add_argument("--record", metavar="PATH",
                   help="write the trace there (CSV, or Parquet for *.parquet), plus PATH-stem.commands.csv and PATH-stem.scenario.yaml "
                        "to replay it with trundle run")
    p.add_argument("--step", type=float, default=0.01, metavar="S", help="engine step in s (default 0.01)")
    p.add_argument("--align", default="wait", metavar="POLICY",
                   help="starting steering policy: wait, cosine or none (default wait; P cycles it while driving)")
    p.add_argument("--deadband", type=float, default=0.15, metavar="D",
                   help="gamepad stick dead band, 0..1 of full deflection (default 0.15)")
    p.add_argument("--enable-button", type=int, action="append", metavar="N", dest="enable_buttons",
                   help="gamepad button that must be held for the sticks to drive (repeatable; default: 4 and 5, "
                        "the shoulder buttons of most pads)")
    p.add_argument("--level", type=int, default=2, metavar="L",
                   help="starting speed level 1-5: 10, 25, 50, 75 or 100 %% of the caps (default 2; keys 1-5 change it)")


def run(args) -> int:
    from sim.errors import require
    require("pygame", "trundle drive")
    import math

    from sim.view.drive import DriveSession
    from sim.engine.simulator import ALIGN_POLICIES
    from sim.errors import InputError
    from sim.files.robotfile import load_robot

    if args.align not in ALIGN_POLICIES:
        raise InputError("--align", None, f"must be one of {', '.join(ALIGN_POLICIES)}, got '{args.align}'")
    if not (args.step > 0 and math.isfinite(args.step)):
        raise InputError("--step", None, f"must be a number > 0 s, got {args.step:g}")
    if not 0 <= args.deadband < 1:
        raise InputError("--deadband", None, f"must be in [0, 1), got {args.deadband:g}")
    if not 1 <= args.level <= 5:
        raise InputError("--level", None, f"must be 1, 2, 3, 4 or 5, got {args.level}")
    if args.enable_buttons and min(args.enable_buttons) < 0:
        raise InputError("--enable-button", None, f"must be a button number >= 0, got {min(args.enable_buttons)}")
    robot = load_robot(args.robot)
    from sim.cli.options import print_warnings
    print_warnings(robot)
    session = DriveSession(robot, args.robot, step=args.step, record=args.record, align=args.align,
                           deadband=args.deadband, enable_buttons=args.enable_buttons, level=args.level)
    try:
        code = session.run()
    except BaseException:
        session.abort()
        raise
    files = session.close()
    row = session.row
    if row is not None:
        x, y, th = row.pose
        print(f"drove     {row.t:.2f} s, final x {x:.4f} m  y {y:.4f} m  theta {math.degrees(th):.3f} deg")
    for f in files:
        print(f"wrote     {f}")
    if session.recorder and session.recorder.policy_changes:
        print("note      the steering policy changed while driving; the replay scenario keeps the first one")
    return code
