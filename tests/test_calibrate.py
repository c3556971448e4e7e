"""Odometry calibration: the square test (sim/calibrate.py) and the geometry fit (sim/geomfit.py)."""
from __future__ import annotations

import math
import os
from dataclasses import replace

import numpy as np
import pytest
import yaml

from sim.runs import calibrate as C
from sim.runs import geomfit as G
from sim.cli import main
from sim.errors import InputError
from sim.files.robotfile import load_robot
from sim.runs.runner import run_scenario
from sim.files.scenario import scenario_from_data

HERE = os.path.dirname(os.path.abspath(__file__))
SCEN = os.path.join(HERE, "..", "scenarios")
CART = os.path.join(SCEN, "robots", "ward-cart.yaml")
L = 4.0          # m, the paper's square
FAST = dict(dt=0.25)


def as_built(belief, Ed, Eb):
    """The cart with right/left diameter ratio Ed (mean kept) and wheelbase Eb times the belief's."""
    w = list(belief.wheels)
    w[0] = replace(w[0], radius=w[0].radius * 2 / (Ed + 1), y=w[0].y * Eb)
    w[1] = replace(w[1], radius=w[1].radius * 2 / (1 / Ed + 1), y=w[1].y * Eb)
    return replace(belief, wheels=tuple(w), source="<as built>")


def bf_angles(Ed, Eb, b):
    """Borenstein & Feng's error angles (from memory of the paper): Eb = 90deg / (90deg - alpha);
    Ed = (R + b/2) / (R - b/2) with R = (L/2) / sin(beta/2) (b the actual wheelbase)."""
    alpha = (math.pi / 2) * (1 - 1 / Eb)
    if Ed == 1:
        return alpha, 0.0
    R = (Eb * b / 2) * (Ed + 1) / (Ed - 1)
    return alpha, 2 * math.asin((L / 2) / R)


def bf_returns(alpha, beta):
    """Centres of gravity predicted by Borenstein & Feng's relations (from memory; first
    order, start frame x along the first leg, y left):
    x_cw = y_cw = -2L(alpha + beta), x_ccw = -y_ccw = 2L(beta - alpha)."""
    return np.array([-2 * L * (alpha + beta)] * 2), np.array([2 * L * (beta - alpha), -2 * L * (beta - alpha)])


@pytest.mark.parametrize("Ed,Eb", [(1.002, 1.005), (0.997, 0.994), (1.0, 1.01), (1.003, 1.0)])
def test_return_errors_follow_borenstein_feng_relations(Ed, Eb):
    belief = load_robot(CART)
    runs = C.square_test(as_built(belief, Ed, Eb), belief, runs=3, side=L, **FAST)
    alpha, beta = bf_angles(Ed, Eb, 0.44)
    cw, ccw = bf_returns(alpha, beta)
    scale = max(np.hypot(*cw), np.hypot(*ccw))
    assert scale > 0.05
    # first-order relations: agreement to second order (well within 10 % here)
    assert np.max(np.abs(runs.cw.mean(axis=0) - cw)) < 0.1 * scale
    assert np.max(np.abs(runs.ccw.mean(axis=0) - ccw)) < 0.1 * scale


@pytest.mark.parametrize("Ed,Eb,noise", [(1.004, 1.01, 0.0), (0.996, 0.99, 1.5)])
def test_corrections_recover_the_factors_and_cut_the_return_error_tenfold(Ed, Eb, noise):
    belief = load_robot(CART)
    true = as_built(belief, Ed, Eb)
    before = C.square_test(true, belief, runs=5, side=L, count_noise=noise, seed=4, **FAST)
    u = C.analyse(before, 0.44)
    assert u.Ed == pytest.approx(Ed, abs=0.1 * abs(Ed - 1))
    assert u.Eb == pytest.approx(Eb, abs=0.1 * abs(Eb - 1))
    fixed = C.corrected_robot(belief, C.diff_drive(belief), u.Ed, u.Eb)
    after = C.square_test(true, fixed, runs=5, side=L, count_noise=noise, seed=4, **FAST)
    e0, e1 = C.centres(before)[2], C.centres(after)[2]
    assert e0 > 0.2
    assert e1 < e0 / 10


def test_analysis_inverts_the_first_order_relations_exactly():
    # returns made with the relations themselves give back alpha and beta exactly, and
    # Ed, Eb by the paper's equations
    alpha, beta = math.radians(0.8), math.radians(-1.5)
    cw, ccw = bf_returns(alpha, beta)
    u = C.analyse(C.SquareRuns(L, np.tile(cw, (5, 1)), np.tile(ccw, (5, 1))), 0.44)
    assert u.alpha == pytest.approx(alpha, rel=1e-12) and u.beta == pytest.approx(beta, rel=1e-12)
    assert u.Eb == pytest.approx(90 / (90 - 0.8), rel=1e-12)
    R = (L / 2) / math.sin(beta / 2)
    b = u.Eb * 0.44
    assert u.Ed == pytest.approx((R + b / 2) / (R - b / 2), rel=1e-12)
    assert u.Ed < 1                       # legs bending right: the right wheel is the smaller


def test_cli_simulated_square_test_writes_a_better_robot_file(tmp_path, capsys):
    belief = load_robot(CART)
    true = as_built(belief, 1.003, 1.008)
    tpath = tmp_path / "as-built.yaml"
    tpath.write_text(C.robot_yaml(true))
    assert replace(load_robot(tpath), source=true.source) == true      # the writer round-trips
    out, png = tmp_path / "fixed.yaml", tmp_path / "sq.png"
    rc = main(["calibrate", CART, "--true", str(tpath), "--runs", "3", "--step", "0.25",
               "-o", str(out), "--plot", str(png)])
    text = capsys.readouterr().out
    assert rc == 0
    fixed = load_robot(out)
    dd = C.diff_drive(fixed)
    assert dd.b == pytest.approx(0.44 * 1.008, rel=1e-3)
    ratio = fixed.wheel("right").radius / fixed.wheel("left").radius
    assert ratio == pytest.approx(1.003, abs=2e-4)
    factor = float(text.split("improvement")[1].split("x")[0])
    assert factor >= 10
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert not list(tmp_path.glob("*.part"))
    # the four clouds in Okabe-Ito colours (README "Colours and symbols"), none in matplotlib's default cycle
    from matplotlib.image import imread
    rgb = (imread(png)[:, :, :3] * 255).round().astype(int)
    count = lambda h: int(np.all(rgb == [int(h[i:i + 2], 16) for i in (0, 2, 4)], axis=2).sum())
    for okabe_ito in ("0072B2", "D55E00", "56B4E9", "E69F00"):
        assert count(okabe_ito) > 20, okabe_ito
    for default in ("1f77b4", "d62728", "17becf", "ff7f0e"):
        assert count(default) == 0, default


def test_cli_measured_returns_yaml_and_csv_agree(tmp_path, capsys):
    alpha, beta = math.radians(0.5), math.radians(1.2)
    cw, ccw = bf_returns(alpha, beta)
    rng = np.random.default_rng(1)
    pcw, pccw = cw + rng.normal(0, 0.005, (5, 2)), ccw + rng.normal(0, 0.005, (5, 2))
    y = tmp_path / "runs.yaml"
    pcw, pccw = pcw.tolist(), pccw.tolist()
    y.write_text("side: 4\ncw:\n" + "".join(f"  - [{a!r}, {b!r}]\n" for a, b in pcw)
                 + "ccw:\n" + "".join(f"  - {{x: {a!r}, y: {b!r}}}\n" for a, b in pccw))
    c = tmp_path / "runs.csv"
    c.write_text("direction,x,y\n" + "".join(f"cw,{a!r},{b!r}\n" for a, b in pcw)
                 + "".join(f"CCW,{a!r},{b!r}\n" for a, b in pccw))
    outs = []
    for src in (y, c):
        out = tmp_path / f"fixed-{src.suffix[1:]}.yaml"
        assert main(["calibrate", CART, "--measured", str(src), "-o", str(out)]) == 0
        outs.append(out.read_text().split("\n", 2)[2])      # past the two comment lines
    assert outs[0] == outs[1]
    text = capsys.readouterr().out
    assert "model check" in text
    fixed = load_robot(tmp_path / "fixed-yaml.yaml")
    Eb = 90 / (90 - math.degrees(alpha))
    assert C.diff_drive(fixed).b == pytest.approx(0.44 * Eb, rel=2e-3)
    assert fixed.wheel("right").radius > fixed.wheel("left").radius    # legs bent left


def _sympy_square_differences():
    """x - y differences of the two alpha and the two beta estimates of the exact square,
    to second order, by sympy: each leg an arc of length 1 bending left by beta, each 90 deg
    turn short by alpha, composed as homogeneous SE(2) matrices truncated at second order
    (an independent derivation; common practice)."""
    import sympy as sp
    a, b, e = sp.symbols("alpha beta epsilon", real=True)

    def trunc(x):
        return sum((t for t in sp.Add.make_args(sp.expand(x)) if sp.degree(t, e) < 3), sp.Integer(0))

    T = lambda c, s_, x, y: sp.Matrix([[c, -s_, x], [s_, c, y], [0, 0, 1]])
    A, B = e * a, e * b
    leg = T(1 - B ** 2 / 2, B, 1 - B ** 2 / 6, B / 2)        # (sin B / B, (1 - cos B) / B) to 2nd order
    ends = []
    for d in (-1, 1):
        M = sp.eye(3)
        for _ in range(4):                                  # cos(90deg - A) = sin A, sin = cos A
            M = (M * leg * T(A, d * (1 - A ** 2 / 2), 0, 0)).applyfunc(trunc)
        ends.append((M[0, 2], M[1, 2]))
    (xcw, ycw), (xccw, yccw) = ends
    da = sp.expand(((xcw + xccw) - (ycw - yccw)) / -4).subs(e, 1)
    db = sp.expand(((xcw - xccw) - (ycw + yccw)) / -4).subs(e, 1)
    return sp.lambdify((a, b), da), sp.lambdify((a, b), db), sp.expand(da + 3 * a ** 2 + 4 * b ** 2), \
        sp.expand(db + 7 * a * b)


def test_exact_square_agrees_with_first_and_second_order_relations():
    da, db, rest_a, rest_b = _sympy_square_differences()
    assert rest_a == 0 and rest_b == 0        # the README's -(3 alpha^2 + 4 beta^2) and -7 alpha beta
    for alpha, beta in ((0.004, 0.007), (-0.006, 0.003), (0.005, -0.008)):
        est = C.estimates(*C.square_returns(alpha, beta, L), L)
        # Borenstein & Feng's first-order relations (from memory): each estimate is alpha (beta),
        # to second order (the sympy terms are at most 5 max(|alpha|, |beta|)^2 here)
        tol = 5 * max(abs(alpha), abs(beta)) ** 2
        assert est[:2] == pytest.approx([alpha, alpha], abs=tol) and est[2:] == pytest.approx([beta, beta], abs=tol)
        # the second-order differences: agreement to third order (|angle| <= 0.008: ~1e-6 rad)
        assert est[0] - est[1] == pytest.approx(da(alpha, beta), abs=3e-6)
        assert est[2] - est[3] == pytest.approx(db(alpha, beta), abs=3e-6)
        assert abs(da(alpha, beta)) > 1e-4 or abs(db(alpha, beta)) > 1e-4


def _from_estimates(ax, ay, bx, by):
    """Centres of gravity (cw, ccw) with these estimates (rad), inverting the README's relations."""
    return (np.array([-2 * L * (ax + bx), -2 * L * (ay + by)]), np.array([-2 * L * (ax - bx), -2 * L * (by - ay)]))


def _scatter(rng, n, sigma):
    """n return-error offsets (n, 2) m of standard deviation sigma with mean exactly 0."""
    off = rng.normal(0, sigma, (n, 2))
    return off - off.mean(axis=0)


@pytest.mark.parametrize("sigma", [0.01, 0.06])
def test_made_up_inconsistent_file_is_refused(tmp_path, capsys, sigma):
    # the new-user file: alpha -2.5 deg from the x errors but -3.9 deg from the y errors (beta
    # 1.07 vs 2.58 deg); at 60 mm of scatter per run the allowance for scatter is capped
    cw, ccw = _from_estimates(*map(math.radians, (-2.5, -3.9, 1.07, 2.58)))
    rng = np.random.default_rng(7)
    src = tmp_path / "made-up.yaml"
    src.write_text(_runs_yaml(cw + _scatter(rng, 5, sigma), ccw + _scatter(rng, 5, sigma)))
    out = tmp_path / "fixed.yaml"
    assert main(["calibrate", CART, "--measured", str(src), "-o", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"{src}:2: inconsistent square test: alpha (turn error) is -2.5 deg from the x errors "
                          "but -3.9 deg from the y errors (x - y = +1.4 deg)")
    assert "beta (leg curvature) is 1.07 deg from the x errors but 2.58 deg from the y errors" in err
    assert ("capped at 0.5 deg" in err) == (sigma > 0.05) and "Traceback" not in err
    assert not out.exists() and not list(tmp_path.glob("*.part"))


def test_consistent_file_from_borenstein_feng_relations_is_accepted(tmp_path, capsys):
    # Borenstein & Feng's first-order relations (from memory, bf_returns) for a turn error of
    # 1 deg and legs bending right by 1.5 deg, 15 mm of scatter per run (5 runs each way)
    alpha, beta = math.radians(1.0), math.radians(-1.5)
    cw, ccw = bf_returns(alpha, beta)
    rng = np.random.default_rng(3)
    src = tmp_path / "measured.yaml"
    src.write_text(_runs_yaml(cw + rng.normal(0, 0.015, (5, 2)), ccw + rng.normal(0, 0.015, (5, 2))))
    out = tmp_path / "fixed.yaml"
    assert main(["calibrate", CART, "--measured", str(src), "-o", str(out)]) == 0
    text = capsys.readouterr().out
    fixed = load_robot(out)
    # Eb = 90 deg / (90 deg - alpha); Ed = (R + b/2) / (R - b/2), R = (L/2) / sin(beta/2) (from
    # memory of the paper); the scatter moves alpha and beta by about 0.03 deg
    Eb = 90 / (90 - 1.0)
    R, b = (L / 2) / math.sin(beta / 2), Eb * 0.44
    assert C.diff_drive(fixed).b / 0.44 == pytest.approx(Eb, abs=1.5e-3)
    assert fixed.wheel("right").radius / fixed.wheel("left").radius == pytest.approx((R + b / 2) / (R - b / 2),
                                                                                      abs=3e-4)
    check = text.split("model check")[1].split("\n")[0]
    gap = float(check.split("within")[1].split("mm")[0])
    allowed = [float(check.split(k)[1].split()[0].rstrip(",")) for k in ("allowed cw", "ccw")]
    e_max = float(text.split("E_max")[1].split("mm")[0])
    assert gap <= min(allowed) and max(allowed) < e_max / 3


def test_consistency_check_separates_scatter_from_disagreement():
    # 200 noisy square tests each: first-order returns (Borenstein & Feng, from memory) with
    # 10 mm of scatter are all accepted; the same with alpha_x - alpha_y pushed to +0.6 deg
    # (the exact square puts it at or below 0 here) are all refused
    rng = np.random.default_rng(11)
    accepted = refused = 0
    for _ in range(200):
        alpha, beta = np.radians(rng.uniform(-2, 2, 2))
        cw, ccw = bf_returns(alpha, beta)
        noise = rng.normal(0, 0.01, (2, 5, 2))
        C.analyse(C.SquareRuns(L, cw + noise[0], ccw + noise[1]), 0.44)
        accepted += 1
        d = math.radians(0.3)
        bcw, bccw = _from_estimates(alpha + d, alpha - d, beta, beta)
        with pytest.raises(InputError, match="alpha .turn error. is"):
            C.analyse(C.SquareRuns(L, bcw + noise[0], bccw + noise[1]), 0.44)
        refused += 1
    assert accepted == refused == 200


# -- bad input --------------------------------------------------------------------
def _runs_yaml(cw, ccw, side="side: 4\n"):
    f = lambda pts: "".join(f"  - [{float(a)!r}, {float(b)!r}]\n" for a, b in pts)
    return side + "cw:\n" + f(cw) + "ccw:\n" + f(ccw)


CW, CCW = bf_returns(math.radians(0.6), math.radians(1.0))
BAD_MEASURED = [
    ("few.yaml", _runs_yaml([CW, CW], [CCW] * 5), "cw: 2 run(s); the square test needs at least 3", 2),
    ("swapped.yaml", _runs_yaml([CCW] * 5, [CW] * 5), "inconsistent square test: alpha", 2),
    ("yflip.yaml", _runs_yaml([CW * (1, -1)] * 5, [CCW * (1, -1)] * 5), "inconsistent square test: alpha", 2),
    ("side.yaml", _runs_yaml([CW] * 3, [CCW] * 3, "side: -4\n"), "must be > 0", 1),
    ("pair.yaml", "cw:\n  - [0.1]\nccw: []\n", "expected [x, y], got 1 values", 2),
    ("word.yaml", "cw:\n  - [0.1, abc]\nccw: []\n", "expected a number (m), got 'abc'", 2),
    ("key.yaml", "cw: []\nccw: []\nsides: 4\n", "unknown key 'sides'", 3),
    ("dir.csv", "direction,x,y\ncw,0.1,0.2\nup,0.1,0.2\n", "direction must be cw or ccw, got 'up'", 3),
    ("cell.csv", "direction,x,y\ncw,0.1,\n", "column 'y': expected a number (m), got ''", 2),
    ("head.csv", "dir,x,y\n", "expected the columns direction,x,y", 1),
    ("few.csv", "direction,x,y\n" + "cw,0,0\n" * 5 + "ccw,0,0\n", "ccw: 1 run(s)", 7),
]


@pytest.mark.parametrize("name,text,message,line", BAD_MEASURED)
def test_bad_measured_returns_exit_2_without_output(tmp_path, capsys, name, text, message, line):
    src = tmp_path / name
    src.write_text(text)
    out = tmp_path / "fixed.yaml"
    assert main(["calibrate", CART, "--measured", str(src), "-o", str(out)]) == 2
    err = capsys.readouterr().err
    assert f"{src}:{line}: " in err and message in err and "Traceback" not in err
    assert not out.exists() and not list(tmp_path.glob("*.part"))


def test_bad_calibration_arguments(tmp_path, capsys):
    src = tmp_path / "ok.yaml"
    src.write_text(_runs_yaml([CW] * 5, [CCW] * 5))
    out = tmp_path / "fixed.yaml"
    mecanum = os.path.join(SCEN, "robots", "tote-mecanum.yaml")
    other = tmp_path / "other.yaml"
    other.write_text("wheels:\n  - {name: a, type: fixed, x: 0, y: 0.2, radius: 0.1}\n"
                     "  - {name: b, type: fixed, x: 0, y: -0.2, radius: 0.1}\n")
    cases = [
        (["--measured", str(src), "--runs", "2", "--side", "4"], "--runs: 2 run(s) per direction"),
        (["--measured", str(src), "--side", "5"], "the file says side 4 m but --side says 5 m"),
        (["--true", str(other)], "must match"),
        (["--true", CART, "--step", "0"], "--step: must be a finite number > 0"),
    ]
    for extra, message in cases:
        assert main(["calibrate", CART, *extra, "-o", str(out)]) == 2
        err = capsys.readouterr().err
        assert message in err and "Traceback" not in err, (extra, err)
    assert main(["calibrate", mecanum, "--measured", str(src), "-o", str(out)]) == 2
    err = capsys.readouterr().err
    assert "needs a differential-drive base" in err and "--fit" in err
    assert not out.exists() and not list(tmp_path.glob("*.part"))


# -- geometry fit, other layouts -----------------------------------------------------
def _record(robot_data, script, duration, tmp_path, name, odometry=None):
    data = {"robot": robot_data, "step": 0.05, "duration": duration, "script": script}
    if odometry:
        data["odometry"] = odometry
    path = tmp_path / name
    run_scenario(scenario_from_data(data, "<test>", base_dir=SCEN), csv=str(path))
    return path


def _data(robot):
    """An inline robot mapping for a scenario (through the robot-file writer)."""
    return yaml.safe_load(C.robot_yaml(robot))


def test_fit_recovers_radii_and_lever_arms_of_an_omni_base(tmp_path, capsys):
    nominal = load_robot(os.path.join(SCEN, "robots", "camera-dolly.yaml"))
    true = replace(nominal, wheels=(replace(nominal.wheels[0], radius=0.0506, x=0.253),
                                    replace(nominal.wheels[1], radius=0.0497),
                                    nominal.wheels[2]))
    script = [{"at": 0, "twist": {"vx": 0.3}}, {"at": 2, "twist": {"vy": 0.3, "omega": 0.6}},
              {"at": 4, "twist": {"vx": 0.2, "vy": -0.1, "omega": -0.8}}, {"at": 6, "stop": True}]
    run = _record(_data(true), script, 7, tmp_path, "run.csv")
    npath = tmp_path / "nominal.yaml"
    npath.write_text(C.robot_yaml(nominal))
    out = tmp_path / "fitted.yaml"
    assert main(["calibrate", str(npath), "--fit", str(run), "--wheels", "nose,left,right", "-o", str(out)]) == 0
    text = capsys.readouterr().out
    fitted = load_robot(out)
    for t, f in zip(true.wheels, fitted.wheels):
        assert f.radius == pytest.approx(t.radius, rel=1e-7)
        # the rolling row sees only the lever arm x sin h - y cos h (constraints.rolling_rows)
        arm = lambda w: w.x * math.sin(w.heading) - w.y * math.cos(w.heading)
        assert arm(f) == pytest.approx(arm(t), abs=1e-8)
    assert "undetermined" in text
    rec = G.read_record(run, nominal, ["nose", "left", "right"])
    e0 = G.track_errors(G.replay(nominal, ["nose", "left", "right"], rec), rec.pose)["final_position_error"]
    e1 = G.track_errors(G.replay(fitted, ["nose", "left", "right"], rec), rec.pose)["final_position_error"]
    assert e0 > 1e-3 and e1 < e0 / 1000


def test_fit_from_encoder_counts_of_a_differential_base(tmp_path):
    belief = load_robot(CART)
    true = as_built(belief, 1.004, 1.01)
    script = [{"at": 0, "twist": {"vx": 0.4, "omega": 0.3}}, {"at": 5, "twist": {"vx": 0.3, "omega": -0.6}},
              {"at": 10, "twist": {"omega": 1.0}}, {"at": 14, "stop": True}]
    run = _record(_data(true), script, 15, tmp_path, "run.csv", {"wheels": ["left", "right"]})
    rec = G.read_record(run, belief, ["left", "right"])
    res = G.fit_geometry(belief, ["left", "right"], [rec])
    # 2048 counts: radii to about one count over the run
    assert res.robot.wheel("left").radius == pytest.approx(true.wheel("left").radius, rel=2e-4)
    assert res.robot.wheel("right").radius == pytest.approx(true.wheel("right").radius, rel=2e-4)
    assert C.diff_drive(res.robot).b == pytest.approx(0.44 * 1.01, rel=1e-3)
    assert set(res.undetermined) == {"left.x", "right.x"}        # only their mean enters (vy + x omega = 0)


def test_bad_fit_input(tmp_path, capsys):
    good = _record(_data(load_robot(CART)), [{"at": 0, "twist": {"vx": 0.3, "omega": 0.4}}], 3, tmp_path, "run.csv")
    lines = good.read_text().splitlines()
    header = lines[0].split(",")
    ix, iy = header.index("x"), header.index("y")
    scrambled = [lines[0]]
    rng = np.random.default_rng(0)
    for ln in lines[1:]:
        cells = ln.split(",")
        cells[ix], cells[iy] = repr(rng.uniform(-5, 5)), repr(rng.uniform(-5, 5))
        scrambled.append(",".join(cells))
    cases = [
        ("nocol.csv", "\n".join([",".join(h for h in header if h != "left.spin")] +
                                [",".join(c for h, c in zip(header, ln.split(",")) if h != "left.spin")
                                 for ln in lines[1:]]) + "\n", "no column 'left.counts' or 'left.spin'"),
        ("still.csv", lines[0] + "\n" + "\n".join([lines[1]] * 0) + "\n", "at least 3 rows"),
        ("scrambled.csv", "\n".join(scrambled) + "\n", "inconsistent recorded runs"),
        ("time.csv", "\n".join([lines[0], lines[2], lines[1], lines[3]]) + "\n", "'t' must increase"),
    ]
    out = tmp_path / "fixed.yaml"
    for name, text, message in cases:
        p = tmp_path / name
        p.write_text(text)
        assert main(["calibrate", CART, "--fit", str(p), "-o", str(out)]) == 2, name
        err = capsys.readouterr().err
        assert message in err and "Traceback" not in err, (name, err)
        assert err.startswith(str(p))
    assert main(["calibrate", CART, "--fit", str(good), "--wheels", "left", "-o", str(out)]) == 2
    assert "determine only 2 of the 3" in capsys.readouterr().err
    assert not out.exists() and not list(tmp_path.glob("*.part"))


# -- the corrected file ------------------------------------------------------------
COMMENTED = """\
# Our test cart: two drive wheels and one castor.
name: cart            # as on the label
footprint:
  length: 0.70
  width: 0.50
wheels:
  - name: left        # drive, left side
    type: fixed
    x: 0.0
    y: 0.22           # measured with a tape
    radius: "0.08"    # catalogue value
    max_spin: 25
    encoder: 2048
  - {name: right,  type: fixed, x: 0.0, y: -0.22,  radius: 0.08, max_spin: 25, encoder: 2048}   # aligned
  - name: castor
    type: castor
    x: 0.28
    y: 0.0
    radius: 0.04
    trail: 0.03       # swivel offset
"""


def test_corrected_file_keeps_comments_and_layout_and_rounds_to_the_measurement(tmp_path, capsys):
    nominal = tmp_path / "cart.yaml"
    nominal.write_text(COMMENTED)
    belief = load_robot(nominal)
    true = as_built(belief, 1.003, 1.008)
    tpath = tmp_path / "as-built.yaml"
    tpath.write_text(C.robot_yaml(true))
    out = tmp_path / "fixed.yaml"
    assert main(["calibrate", str(nominal), "--true", str(tpath), "--runs", "3", "--step", "0.25",
                 "-o", str(out)]) == 0
    text = capsys.readouterr().out
    got = out.read_text().splitlines()
    assert got[0].startswith("# odometry geometry corrected by trundle calibrate from cart.yaml: left.radius")
    assert got[1].startswith("# square test (Borenstein & Feng 1996)")
    want = COMMENTED.splitlines()
    assert len(got) == len(want) + 2
    changed = [(a, b) for a, b in zip(want, got[2:]) if a != b]
    # every other byte is the user's: only the four corrected values differ, comments and quotes kept around them
    assert [a for a, _ in changed] == ['    y: 0.22           # measured with a tape',
                                       '    radius: "0.08"    # catalogue value',
                                       want[13]]
    assert changed[0][1].endswith("           # measured with a tape")
    assert changed[1][1].startswith("    radius: 0.0") and changed[1][1].endswith("    # catalogue value")
    assert changed[2][1].startswith("  - {name: right,  type: fixed, x: 0.0, y: -0.2")
    assert changed[2][1].endswith(", max_spin: 25, encoder: 2048}   # aligned")
    # the values: the square test's result rounded to the decade of its standard error, no further
    fixed = load_robot(out)
    dd = C.diff_drive(belief)
    runs = C.square_test(true, belief, runs=3, side=C.DEFAULT_SIDE, dt=0.25)
    u = C.analyse(runs, dd.b)
    exact = C.corrected_robot(belief, dd, u.Ed, u.Eb)
    sigma = C.corrected_uncertainty(u, belief, dd)
    for (name, key), sg in sigma.items():
        res = 10.0 ** math.floor(math.log10(sg))
        assert 1e-9 <= res <= 1e-5
        v, e = getattr(fixed.wheel(name), key), getattr(exact.wheel(name), key)
        assert abs(v - e) <= res / 2 * (1 + 1e-9)                     # rounded to res ...
        assert abs(v / res - round(v / res)) < 1e-6                  # ... and no digit beyond it
        written = next(t for t in text.splitlines() if t.startswith(f"corrected   {name}:"))
        assert f"{key} {getattr(belief.wheel(name), key):g} -> {v!r} m" in written
    # the standard errors by hand: alpha, beta each the mean of two estimates, scatter / 2
    s = u.scatter / 2
    assert sigma[("left", "y")] == pytest.approx(0.22 * u.Eb ** 2 * s / (math.pi / 2), rel=1e-12)
    assert sigma[("left", "radius")] == pytest.approx(0.08 * 0.44 * u.Eb / 4.0 * s / 2, rel=1e-12)
    # everything the calibration did not touch reads back the same
    assert replace(fixed, wheels=(), source="") == replace(belief, wheels=(), source="")
    assert fixed.wheel("castor") == belief.wheel("castor")
    for name in ("left", "right"):
        assert replace(fixed.wheel(name), radius=0, y=0) == replace(belief.wheel(name), radius=0, y=0)


def test_rewrite_replaces_values_in_place():
    from sim.files.robotedit import number_text, resolution, rewrite
    assert resolution(3.2e-7) == 1e-7 and resolution(9e-6) == 1e-6 and resolution(1e-12) == 1e-9
    assert resolution(0.5) == 1e-3
    assert number_text(0.0800809123, 1e-7) == "0.0800809" and number_text(-0.2218084, 1e-6) == "-0.221808"
    assert number_text(0.5000001, 1e-6) == "0.5" and number_text(-1e-9, 1e-6) == "0.0"
    text = "wheels:\n  - {name: a, x: 0.1, y: '0.2', radius: 0.05}   # c\n  - name: b\n    x: 1\n    y: -2 # d\n"
    out = rewrite(text, "t.yaml", {("a", "y"): "0.25", ("b", "y"): "-2.5", ("a", "radius"): "0.051"}, ["h"])
    assert out == ("# h\nwheels:\n  - {name: a, x: 0.1, y: 0.25, radius: 0.051}   # c\n  - name: b\n    x: 1\n"
                   "    y: -2.5 # d\n")
    with pytest.raises(InputError, match="no 'radius' of a wheel named 'c'"):
        rewrite(text, "t.yaml", {("c", "radius"): "1.0"})


def test_help_and_readme_agree_on_the_output_name(capsys):
    with pytest.raises(SystemExit):
        main(["calibrate", "--help"])
    import re
    helptext = re.sub(r"-\s+", "-", " ".join(capsys.readouterr().out.split()))   # argparse wraps at hyphens
    assert "default STEM-calibrated.yaml in the current directory, STEM being the robot file's name without .yaml" \
        in helptext
    with open(os.path.join(HERE, "..", "README.md"), encoding="utf-8") as fh:
        readme = " ".join(fh.read().split())
    assert "default `STEM-calibrated.yaml` in the current directory, STEM being the robot file's name without " \
           "`.yaml`" in readme
