"""``trundle calibrate ROBOT.yaml``: systematic odometry errors, measured and corrected.

ROBOT.yaml is the geometry the base's odometry believes (nominal).  Exactly one of:

``--true TRUE.yaml``   simulate the square test (differential drive) on the base as built
``--measured FILE``    square-test return errors taken on the real base (YAML, CSV or Parquet)
``--fit RUN.csv``      fit radii and mount positions to recorded runs (any layout; repeatable)

Writes the corrected robot file (``-o``, default ``STEM-calibrated.yaml`` in the current directory,
STEM being the robot file's name without ``.yaml``): the robot file as written, comments and layout
kept, with only the corrected values replaced, rounded to the digits the measurement supports.
"""
from __future__ import annotations

import math
import os

NAME = "calibrate"
HELP = "odometry calibration: square test (differential drive) or geometry fit to recorded runs"


def add_arguments(p):
    p.add_argument("robot", help="robot file with the geometry the odometry believes (nominal)")
    mode = p.add_mutually_exclusive_group(required=True)
    mode.add_argument("--true", metavar="TRUE.yaml", dest="true_robot",
                      help="simulate the square test on this robot file (the base as built)")
    mode.add_argument("--measured", metavar="FILE",
                      help="return errors of a square test on the real base: YAML {side, cw, ccw}, or CSV or Parquet direction,x,y")
    mode.add_argument("--fit", metavar="RUN.csv", action="append",
                      help="recorded run with ground truth (t,x,y,theta + NAME.counts or NAME.spin), CSV or Parquet; repeatable")
    p.add_argument("--runs", type=int, default=5, help="square test: runs per direction (default 5)")
    p.add_argument("--side", type=float, default=None, help="square side in m (default 4, or the file's)")
    p.add_argument("--speed", type=float, default=0.4, help="simulated square: leg speed m/s (default 0.4)")
    p.add_argument("--turn-rate", type=float, default=1.0, help="simulated square: turn rate rad/s (default 1)")
    p.add_argument("--step", type=float, default=0.05, help="simulated square: step in s (default 0.05)")
    p.add_argument("--count-noise", type=float, default=0.0,
                   help="simulated square: encoder count noise, counts per sqrt(revolution) (default 0)")
    p.add_argument("--seed", type=int, default=0, help="simulated square: random seed (default 0)")
    p.add_argument("--wheels", help="--fit: measured wheels, comma-separated (default: wheels with an encoder)")
    p.add_argument("-o", "--output",
                   help="corrected robot file: ROBOT.yaml with the corrected values, comments and layout kept "
                        "(default STEM-calibrated.yaml in the current directory, STEM being the robot file's "
                        "name without .yaml)")
    p.add_argument("--plot", metavar="PNG", help="square test: scatter of the return errors (needs matplotlib)")


def _positive(name, value, allow_zero=False):
    from sim.errors import InputError
    if not math.isfinite(value) or value < 0 or (value == 0 and not allow_zero) or value > 1e6:
        raise InputError(name, None, f"must be a finite number {'>=' if allow_zero else '>'} 0 and at most "
                                     f"1e+06, got {value:g}")


def _mm(v):
    return f"{v * 1e3:9.2f} mm"


def _cg_lines(label, runs):
    from sim.runs.calibrate import centres
    cw, ccw, e = centres(runs)
    return (f"{label:<11} cw ({_mm(cw[0])}, {_mm(cw[1])})   ccw ({_mm(ccw[0])}, {_mm(ccw[1])})   "
            f"E_max {_mm(e)}")


def run(args) -> int:
    import numpy as np

    from sim.errors import InputError
    from sim.files.robotfile import load_robot

    from sim.cli.options import print_warnings

    robot = load_robot(args.robot)
    print_warnings(robot)
    out = args.output or f"{os.path.splitext(os.path.basename(args.robot))[0]}-calibrated.yaml"
    if args.fit:
        return _fit(args, robot, out)
    from sim.runs import calibrate as C
    if args.runs < C.MIN_RUNS:
        raise InputError("--runs", None, f"{args.runs} run(s) per direction; the square test needs at least "
                         f"{C.MIN_RUNS} (Borenstein & Feng use 5)")
    if args.side is not None:
        _positive("--side", args.side)
    for name, v in (("--speed", args.speed), ("--turn-rate", args.turn_rate), ("--step", args.step)):
        _positive(name, v)
    _positive("--count-noise", args.count_noise, allow_zero=True)
    dd = C.diff_drive(robot)
    sim = dict(speed=args.speed, turn_rate=args.turn_rate, dt=args.step)
    if args.true_robot:
        true = load_robot(args.true_robot)
        print_warnings(true)
        C.belief_spec(true, robot, (dd.left, dd.right))   # same wheels?
        side = C.DEFAULT_SIDE if args.side is None else args.side
        before = C.square_test(true, robot, args.runs, side, count_noise=args.count_noise, seed=args.seed, **sim)
        origin = f"simulated on {args.true_robot} (as built), {args.runs} runs each way, side {side:g} m"
    else:
        before = C.read_runs(args.measured, args.side)
        origin = f"measured, {args.measured}: {len(before.cw)} cw and {len(before.ccw)} ccw runs, side {before.side:g} m"
    u = C.analyse(before, dd.b)
    fixed = C.corrected_robot(robot, dd, u.Ed, u.Eb)
    sigma = C.corrected_uncertainty(u, robot, dd)
    texts = _texts(fixed, sigma)
    fixed = _with_texts(fixed, texts)
    lines = [f"square test  {robot.name} ({args.robot}) {origin}", _cg_lines("before", before),
             f"alpha       {math.degrees(u.alpha):.4f} deg per turn (x: {math.degrees(u.alpha_x):.4f}, "
             f"y: {math.degrees(u.alpha_y):.4f})",
             f"beta        {math.degrees(u.beta):.4f} deg per leg (x: {math.degrees(u.beta_x):.4f}, "
             f"y: {math.degrees(u.beta_y):.4f});  R = {u.radius:.4g} m",
             f"agreement   x - y: alpha {math.degrees(u.alpha_x - u.alpha_y):+.4f} deg (exact square "
             f"{math.degrees(u.expect_alpha):+.4f}), beta {math.degrees(u.beta_x - u.beta_y):+.4f} deg "
             f"({math.degrees(u.expect_beta):+.4f}); allowed {math.degrees(u.allowance):.4f} deg beyond "
             f"(standard error {math.degrees(u.scatter):.4f} deg{', scatter allowance capped' if u.capped else ''})",
             f"Ed          {u.Ed:.6f}  (D_right / D_left)",
             f"Eb          {u.Eb:.6f}  (b_actual / b_nominal)"]
    if args.true_robot:
        tl, tr = true.wheel(dd.left), true.wheel(dd.right)
        ed = (tr.radius / robot.wheel(dd.right).radius) / (tl.radius / robot.wheel(dd.left).radius)
        lines.append(f"true        Ed {ed:.6f}, Eb {(tl.y - tr.y) / dd.b:.6f}  (from {args.true_robot})")
    for name in (dd.left, dd.right):
        w0 = robot.wheel(name)
        lines.append(f"corrected   {name}: radius {w0.radius:g} -> {texts[(name, 'radius')]} m, "
                     f"y {w0.y:g} -> {texts[(name, 'y')]} m  (standard errors {sigma[(name, 'radius')]:.1g}, "
                     f"{sigma[(name, 'y')]:.1g} m)")
    after = None
    if args.true_robot:
        after = C.square_test(true, fixed, args.runs, side, count_noise=args.count_noise, seed=args.seed, **sim)
        lines.append(_cg_lines("after", after))
        e0, e1 = C.centres(before)[2], C.centres(after)[2]
        lines.append(f"improvement {e0 / e1:.1f} x" if e1 > 0 else "improvement  (no error left)")
    else:
        model = C.square_test(_with_encoders(fixed, dd), _with_encoders(robot, dd), C.MIN_RUNS, before.side, **sim)
        cw, ccw, _ = C.centres(model)
        m0, m1, _ = C.centres(before)
        gaps = np.array([math.hypot(*(cw - m0)), math.hypot(*(ccw - m1))])
        tol = u.model_tolerance()
        if np.any(gaps > tol):
            k = int(np.argmax(gaps - tol))
            raise InputError(before.source, before.lines[k] or before.lines[0],
                             f"model check failed: driven with the fitted Ed {u.Ed:.6f}, Eb {u.Eb:.6f}, the square "
                             f"returns {gaps[k] * 1e3:.1f} mm from the measured {('cw', 'ccw')[k]} centre of gravity; "
                             f"the scatter of the runs and the higher-order terms allow {tol[k] * 1e3:.1f} mm. "
                             "Wheelbase and diameter errors cannot explain these returns")
        lines.append(f"model check the fitted Ed, Eb reproduce the measured centres of gravity within "
                     f"{gaps.max() * 1e3:.2f} mm (allowed cw {tol[0] * 1e3:.2f}, ccw {tol[1] * 1e3:.2f} mm)")
        lines.append("            drive the square again with the corrected file to confirm the improvement")
    from sim.files.robotedit import write_corrected
    write_corrected(args.robot, out, texts, (
        f"odometry geometry corrected by trundle calibrate from {os.path.basename(args.robot)}: "
        f"{', '.join(f'{n}.{k}' for n, k in texts)}",
        f"square test (Borenstein & Feng 1996): Ed = {u.Ed:.6f}, Eb = {u.Eb:.6f}; {origin}"))
    lines.append(f"wrote       {out}  (values to the digits the test supports: its standard errors)")
    if args.plot:
        from sim.view.plot import plot_square_test
        if plot_square_test(args.plot, before, after, f"{robot.name}: square test, side {before.side:g} m"):
            lines.append(f"plot        {args.plot}")
        else:
            lines.append("plot        skipped: matplotlib is not installed (pip install matplotlib)")
    print("\n".join(lines))
    return 0


def _texts(robot, sigma) -> dict:
    """``{(wheel, key): number text}``: each value of ``robot`` rounded to the decade of its standard error."""
    from sim.files.robotedit import number_text, resolution
    return {(n, k): number_text(getattr(robot.wheel(n), k), resolution(sg)) for (n, k), sg in sigma.items()}


def _with_texts(robot, texts):
    """``robot`` with the values as written (so what is printed, driven and written agree)."""
    from dataclasses import replace
    ws = list(robot.wheels)
    for (n, k), t in texts.items():
        i = robot.index[n]
        ws[i] = replace(ws[i], **{k: float(t)})
    return replace(robot, wheels=tuple(ws))


def _with_encoders(robot, dd):
    """The drive wheels get a fine encoder if they have none (for the model check only)."""
    from dataclasses import replace
    ws = tuple(replace(w, encoder=w.encoder or 2 ** 20) if w.name in (dd.left, dd.right) else w for w in robot.wheels)
    return replace(robot, wheels=ws)


def _fit(args, robot, out) -> int:
    from sim.files import fields as F
    from sim.files.robotedit import write_corrected
    from sim.errors import InputError
    from sim.runs import geomfit as G

    if args.wheels:
        wheels = [w.strip() for w in args.wheels.split(",") if w.strip()]
        for w in wheels:
            if w not in robot.index:
                raise InputError("--wheels", None, f"no wheel named '{w}'{F.suggest(w, robot.index)}")
            if robot.wheel(w).type == "ball":
                raise InputError("--wheels", None, f"wheel '{w}' is a ball wheel; it cannot be measured")
    else:
        wheels = [w.name for w in robot.wheels if w.encoder is not None and w.type != "ball"]
        if not wheels:
            raise InputError("--wheels", None, f"no wheel of {robot.name} has an encoder; name the measured "
                             "wheels with --wheels a,b,...")
    wheels = sorted(set(wheels), key=robot.index.get)
    from sim.odometry.encoders import DeadReckoner
    rank = DeadReckoner(robot, [robot.index[w] for w in wheels]).rank(robot.arrays.heading)
    if rank < 3:
        raise InputError("--wheels", None, f"the wheels {', '.join(wheels)} determine only {rank} of the 3 body "
                         "motions; measure more wheels")
    records = [G.read_record(p, robot, wheels) for p in args.fit]
    res = G.fit_geometry(robot, wheels, records)
    sigma = {(w, k): float(sg) for (w, k), v0, v, sg in zip(res.params, res.start, res.values, res.sigma)
             if v != v0}
    texts = _texts(res.robot, sigma)
    fitted = _with_texts(robot, texts)
    lines = [f"geometry fit  {robot.name} ({args.robot}), wheels {', '.join(wheels)}; "
             f"{len(records)} run(s), {sum(len(r.t) for r in records)} rows; {res.iterations} damped Gauss-Newton steps",
             f"residual      RMS {res.rms_start:.4g} -> {res.rms:.4g} m per window (motion RMS {res.motion:.4g})"]
    for (w, k), v0 in zip(res.params, res.start):
        if f"{w}.{k}" in res.undetermined or (w, k) not in texts:
            continue
        lines.append(f"  {w + '.' + k:<24} {v0:g} -> {texts[(w, k)]} m  (standard error {sigma[(w, k)]:.1g} m)")
    if res.undetermined:
        lines.append(f"undetermined  {', '.join(res.undetermined)}: these runs do not fix them (kept or only "
                     "combinations fitted); add runs that excite them")
    for rec in records:
        e0 = G.track_errors(G.replay(robot, wheels, rec), rec.pose)
        e1 = G.track_errors(G.replay(fitted, wheels, rec), rec.pose)
        lines.append(f"run           {rec.source}: final position error {e0['final_position_error'] * 1e3:.3f} -> "
                     f"{e1['final_position_error'] * 1e3:.3f} mm, heading {math.degrees(e0['final_heading_error']):.4f}"
                     f" -> {math.degrees(e1['final_heading_error']):.4f} deg")
    write_corrected(args.robot, out, texts, (
        f"odometry geometry fitted by trundle calibrate from {os.path.basename(args.robot)}: "
        f"{', '.join(f'{n}.{k}' for n, k in texts) or 'nothing changed'}",
        f"to {', '.join(os.path.basename(f) for f in args.fit)} (wheels {', '.join(wheels)})"))
    lines.append(f"wrote         {out}  (values to the digits the runs support: their standard errors)")
    print("\n".join(lines))
    return 0
