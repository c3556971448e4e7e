"""`trundle analyze` and `trundle run` end to end: JSON, matrices, C export, CSV traces, exit codes."""
from __future__ import annotations

import csv
import io
import json
import math
import pathlib
import shutil
import subprocess

import numpy as np
import pytest

from sim.runs.runner import run_scenario
from sim.files.scenario import load_scenario

ROBOTS = pathlib.Path(__file__).resolve().parents[1] / "scenarios" / "robots"

# Class of each bundled base (Campion et al. 1996 / Siegwart et al. 2011, from memory):
# (mobility, steerability); the skid-steer field rover can only drive straight without skidding.
BUNDLED = {"ward-cart": (2, 0), "tote-mecanum": (3, 0), "camera-dolly": (3, 0),
           "greenhouse-rover": (1, 1), "pallet-tug": (1, 1), "quad-steer": (1, 2), "field-rover": (1, 0)}


@pytest.mark.parametrize("name", sorted(BUNDLED))
def test_analyze_json_integer_keys(name, cli):
    code, out, err = cli(["analyze", ROBOTS / f"{name}.yaml", "--json"])
    assert code == 0, err
    d = json.loads(out)
    for key in ("mobility", "steerability", "maneuverability"):
        assert type(d[key]) is int
    assert (d["mobility"], d["steerability"]) == BUNDLED[name]
    assert d["maneuverability"] == sum(BUNDLED[name])
    assert d["omnidirectional"] is (BUNDLED[name] == (3, 0))


def test_analyze_text_report(cli):
    code, out, _ = cli(["analyze", ROBOTS / "ward-cart.yaml"])
    assert code == 0
    assert "mobility         2" in out and "steerability     0" in out and "maneuverability  2" in out
    # diff drive: the ICR lies on the axle line x = 0 (common practice)
    assert "on the line x = 0.000" in out
    assert "not omnidirectional" in out


def test_analyze_matrices_at_given_steering(cli, textbook):
    steer = ["--steer", "front_left=20deg", "--steer", "front_right=-0.1rad"]
    code, out, err = cli(["analyze", ROBOTS / "greenhouse-rover.yaml", "--json", "--matrices", *steer])
    assert code == 0, err
    m = json.loads(out)["matrices"]
    # textbook no-sliding rows (Siegwart et al. 2011 section 3.2) at the given steering
    np.testing.assert_allclose(m["C1s"][0], textbook.sliding(0.8, 0.3, math.radians(20)), atol=1e-12)
    np.testing.assert_allclose(m["C1s"][1], textbook.sliding(0.8, -0.3, -0.1), atol=1e-12)
    np.testing.assert_allclose(m["C1f"][0], textbook.sliding(0.0, 0.3, 0.0), atol=1e-12)
    np.testing.assert_allclose(m["J1f"][1], textbook.rolling(0.0, -0.3, 0.0), atol=1e-12)
    assert m["J1s"] == [] and m["C1c"] == [] and m["driven"] == ["rear_left", "rear_right"]
    np.testing.assert_allclose(m["J2"], [0.15, 0.15])
    # the same in text
    code, out, _ = cli(["analyze", ROBOTS / "greenhouse-rover.yaml", "--matrices", *steer])
    assert code == 0
    assert "front_left 20.00 deg" in out and "front_right -5.73 deg" in out
    assert "C1s  no-sliding rows, steered wheels" in out


def test_castor_rows_hold_with_the_printed_c2(cli, write_files, tmp_path):
    # a castor at 60 deg on a base driving straight at 0.4 m/s, trail 0.05 m.  By hand (rigid-body
    # kinematics, common practice): the contact point, trail d behind the axis, slides nowhere
    # sideways, so n . v_axis - d hdot = 0 with n = (-sin h, cos h): hdot = -0.4 sin 60 deg / 0.05.
    p = write_files(tmp_path, {"c.yaml": """
        wheels:
          - {name: left, type: fixed, x: 0.0, y: 0.2, radius: 0.1}
          - {name: right, type: fixed, x: 0.0, y: -0.2, radius: 0.1}
          - {name: cas, type: castor, x: 0.3, y: 0.0, radius: 0.04, trail: 0.05}
    """})["c.yaml"]
    xi = np.array([0.4, 0.0, 0.0])
    hdot = -0.4 * math.sin(math.radians(60)) / 0.05
    assert hdot == pytest.approx(-6.9282, abs=1e-4)
    code, out, err = cli(["analyze", p, "--json", "--matrices", "--steer", "cas=60deg"])
    assert code == 0, err
    m = json.loads(out)["matrices"]
    assert m["C2"] == [-0.05]
    assert np.dot(m["C1c"][0], xi) + m["C2"][0] * hdot == pytest.approx(0.0, abs=1e-12)
    # the text states the equation and prints the same numbers
    code, out, err = cli(["analyze", p, "--matrices", "--steer", "cas=60deg"])
    assert "C1c xi + C2 hdot = 0" in out
    row = next(ln for ln in out.splitlines() if ln.strip().startswith("cas ") and "." in ln)
    c1c = np.array([float(v) for v in row.split()[1:]])
    c2 = float(out.split("C2   minus the castor trails (m): cas ")[1].split()[0])
    assert c2 == -0.05
    assert np.dot(c1c, xi) + c2 * hdot == pytest.approx(0.0, abs=1e-5)     # 6 printed decimals
    # and the engine's castor turns at that rate (one small step from 60 deg)
    from sim.theory.castor import swivel
    h1 = swivel(np.array([math.radians(60)]), np.array([0.3]), np.array([0.0]), np.array([0.05]), xi, 1e-6)[0]
    assert (h1 - math.radians(60)) / 1e-6 == pytest.approx(hdot, rel=1e-5)


@pytest.mark.parametrize("arg,fragment", [("front_lef=10deg", "did you mean 'front_left'"),
                                          ("rear_left=10deg", "only steered and castor"),
                                          ("front_left", "NAME=ANGLE"),
                                          ("front_left=ten", "expected an angle")])
def test_analyze_bad_steer(arg, fragment, cli):
    code, out, err = cli(["analyze", ROBOTS / "greenhouse-rover.yaml", "--matrices", "--steer", arg])
    assert code == 2 and "Traceback" not in err
    assert err.startswith("--steer: ") and fragment in err


C_MAIN = r"""
#include <stdio.h>
#include "base.h"
int main(void) {
    const double twist[3] = {0.3, -0.2, 0.5};
    const double spin[4] = {7.0, 9.0, -3.0, 4.0};
    for (int j = 0; j < TOTE_MECANUM_N_DRIVEN; j++) {
        double s = 0.0;
        for (int i = 0; i < 3; i++) s += TOTE_MECANUM_INVERSE[j][i] * twist[i];
        printf("%s %.17g\n", TOTE_MECANUM_WHEEL_NAMES[j], s);
    }
    for (int i = 0; i < 3; i++) {
        double t = 0.0;
        for (int j = 0; j < TOTE_MECANUM_N_DRIVEN; j++) t += TOTE_MECANUM_FORWARD[i][j] * spin[j];
        printf("twist %.17g\n", t);
    }
    return 0;
}
"""


@pytest.mark.skipif(shutil.which("gcc") is None, reason="no C compiler (gcc) installed: the exported header cannot be compiled here")
def test_export_c_header_compiles_and_multiplies(tmp_path, cli):
    header = tmp_path / "base.h"
    code, out, err = cli(["analyze", ROBOTS / "tote-mecanum.yaml", "--export", "c", "-o", header])
    assert code == 0, err
    assert not (tmp_path / "base.h.part").exists()
    (tmp_path / "main.c").write_text(C_MAIN)
    exe = tmp_path / "main"
    subprocess.run(["gcc", "-std=c99", "-Wall", "-Werror", "-o", str(exe), str(tmp_path / "main.c")],
                   check=True, cwd=tmp_path, capture_output=True)
    lines = subprocess.run([str(exe)], check=True, capture_output=True, text=True).stdout.split("\n")
    # Lynch & Park 2017 eq. (13.10) (from memory) for the tote: l = 0.20, w = 0.17, r = 0.05,
    # wheels front_left, front_right, rear_right, rear_left, acting on (omega, vx, vy)
    l, w, r = 0.20, 0.17, 0.05
    H = np.array([[-l - w, 1, -1], [l + w, 1, 1], [l + w, 1, -1], [-l - w, 1, 1]]) / r
    want = H @ [0.5, 0.3, -0.2]
    names = ["front_left", "front_right", "rear_right", "rear_left"]
    for j in range(4):
        name, val = lines[j].split()
        assert name == names[j]
        assert float(val) == pytest.approx(want[j], abs=1e-12)
    # forward: the pseudo-inverse of H (Lynch & Park 2017 section 13.4, from memory)
    tw = np.linalg.pinv(H) @ [7.0, 9.0, -3.0, 4.0]   # (omega, vx, vy)
    got = [float(lines[4 + i].split()[1]) for i in range(3)]
    np.testing.assert_allclose(got, [tw[1], tw[2], tw[0]], atol=1e-12)


def test_export_c_to_stdout(cli):
    code, out, _ = cli(["analyze", ROBOTS / "ward-cart.yaml", "--export", "c"])
    assert code == 0
    assert "#define WARD_CART_N_DRIVEN 2" in out and "WARD_CART_INVERSE[2][3]" in out


# ---- trundle run ------------------------------------------------------------------------

CART = """\
name: cart
wheels:
  - {name: left, type: fixed, x: 0.0, y: 0.22, radius: 0.08}
  - {name: right, type: fixed, x: 0.0, y: -0.22, radius: 0.08}
  - {name: cf, type: castor, x: 0.28, y: 0.0, radius: 0.04, trail: 0.03}
"""
# straight 1 s then an arc: v = r (wR + wL) / 2 = 0.4 m/s first (common practice)
SCEN = """\
robot: cart.yaml
step: 0.01
duration: 2
script:
  - {at: 0, wheels: {left: 5, right: 5}}
  - {at: 1, wheels: {left: 4, right: 6}}
checks:
  - at: 1
    pose: {x: 0.4, y: 0.0, theta: 0 deg}
    tolerance: {position: 1.0e-9, heading: 1.0e-7 deg}
  - slip_below: 1.0e-9
"""


@pytest.fixture
def cart_dir(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "cart.yaml").write_text(CART)
    (tmp_path / "s.yaml").write_text(SCEN)
    return tmp_path


def _read_csv(path):
    raw = pathlib.Path(path).read_bytes()
    rows = list(csv.reader(io.StringIO(raw.decode("ascii"), newline="")))
    return raw, rows[0], rows[1:]


def test_run_exit_codes(cart_dir, cli):
    code, out, _ = cli(["run", "s.yaml"])
    assert code == 0
    assert out.count("PASS") == 2
    # a check that fails: exit 1, the summary says what was measured and expected
    (cart_dir / "f.yaml").write_text(SCEN.replace("x: 0.4,", "x: 0.5,"))
    code, out, _ = cli(["run", "f.yaml"])
    assert code == 1
    fail = next(line for line in out.splitlines() if line.startswith("FAIL"))
    assert "(0.4000, 0.0000) m vs (0.5000, 0.0000)" in fail and "off 0.1 m" in fail
    # bad input: exit 2
    (cart_dir / "b.yaml").write_text(SCEN.replace("step: 0.01", "step: 0"))
    code, out, err = cli(["run", "b.yaml"])
    assert code == 2 and err.startswith("b.yaml:2: ")
    code, _, err = cli(["run", "s.yaml", "--every", "0"])
    assert code == 2 and "--every" in err


def test_run_summary_numbers(cart_dir, cli):
    code, out, _ = cli(["run", "s.yaml"])
    # distance: 0.4 m straight, then 1 s on the arc at 0.4 m/s (common practice)
    assert "distance  0.8000 m" in out
    v, w = 0.08 * 10 / 2, 0.08 * 2 / 0.44
    x = 0.4 + v / w * math.sin(w)
    y = v / w * (1 - math.cos(w))
    assert f"final     x {x:.4f} m  y {y:.4f} m  theta {math.degrees(w):.3f} deg" in out


def test_csv_layout_blanks_and_determinism(cart_dir, cli):
    code, _, _ = cli(["run", "s.yaml", "--csv", "a.csv"])
    assert code == 0
    code, _, _ = cli(["run", "s.yaml", "--csv", "b.csv"])
    raw, header, rows = _read_csv("a.csv")
    assert raw == pathlib.Path("b.csv").read_bytes()          # byte-identical on rerun
    assert raw.endswith(b"\r\n") and raw.count(b"\r\n") == len(rows) + 1 and b"\n" not in raw.replace(b"\r\n", b"")
    # header as README "Trace columns" lists it
    want = ["t", "x", "y", "theta", "vx", "vy", "omega", "icr_x", "icr_y", "slip", "cmd_vx", "cmd_vy", "cmd_omega",
            "scale", "short_vx", "short_vy", "short_omega", "fit", "held", "rank"]
    for w in ("left", "right", "cf"):
        want += [f"{w}.{f}" for f in ("spin_cmd", "spin", "steer_cmd", "steer", "slip_long", "slip_lat",
                                      "angle", "to_go", "at_limit")]
    assert header == want
    assert len(rows) == 201                                     # t = 0 .. 2 s inclusive
    col = {c: [r[i] for r in rows] for i, c in enumerate(header)}
    assert float(col["t"][0]) == 0.0 and float(col["t"][-1]) == pytest.approx(2.0)
    assert all(len(r) == len(header) for r in rows)
    # wheel commands: no twist command
    for c in ("cmd_vx", "cmd_vy", "cmd_omega"):
        assert set(col[c]) == {""}
    # castor: no spin or steer command, no rolling or sideways row
    for c in ("cf.spin_cmd", "cf.steer_cmd", "cf.slip_long", "cf.slip_lat"):
        assert set(col[c]) == {""}
    assert "" not in col["cf.spin"] and "" not in col["cf.steer"]
    # fixed wheels: rolling and no-sliding rows both defined
    assert "" not in col["left.slip_long"] and "" not in col["left.slip_lat"]
    # ICR blank for the straight part, defined on the arc
    straight = [i for i, t in enumerate(col["t"]) if float(t) < 1.0 - 1e-9]
    arc = [i for i, t in enumerate(col["t"]) if float(t) >= 1.0 - 1e-9]
    assert all(col["icr_x"][i] == "" and col["icr_y"][i] == "" for i in straight)
    assert all(col["icr_x"][i] != "" for i in arc)
    # on the arc the ICR (world) sits v / omega from the cart, to its left (common practice)
    i = arc[-1]
    px, py, th = (float(col[c][i]) for c in ("x", "y", "theta"))
    ix, iy = float(col["icr_x"][i]), float(col["icr_y"][i])
    R = 0.4 / (0.08 * 2 / 0.44)
    assert ix == pytest.approx(px - R * math.sin(th), abs=1e-9)
    assert iy == pytest.approx(py + R * math.cos(th), abs=1e-9)
    # round-trip precision: every number cell is the shortest repr of its float
    for r in rows[::20]:
        for cell in r:
            if cell:
                assert repr(float(cell)) == cell


def test_twist_command_columns(cart_dir, cli):
    (cart_dir / "t.yaml").write_text("robot: cart.yaml\nstep: 0.01\nduration: 1\nscript:\n"
                                     "  - {at: 0, twist: {vx: 0.3, omega: 0.2}}\n")
    code, _, _ = cli(["run", "t.yaml", "--csv", "t.csv"])
    assert code == 0
    _, header, rows = _read_csv("t.csv")
    i = header.index("cmd_vx")
    assert all((r[i], r[i + 1], r[i + 2]) == ("0.3", "0.0", "0.2") for r in rows)


@pytest.mark.parametrize("every", [7, 10, 200, 1000])
def test_every_decimates_and_keeps_last_row(every, cart_dir, cli):
    cli(["run", "s.yaml", "--csv", "full.csv"])
    code, out, _ = cli(["run", "s.yaml", "--csv", "dec.csv", "--every", every])
    assert code == 0
    full = pathlib.Path("full.csv").read_bytes().split(b"\r\n")[:-1]
    dec = pathlib.Path("dec.csv").read_bytes().split(b"\r\n")[:-1]
    n = len(full) - 1
    keep = [k for k in range(n) if k % every == 0 or k == n - 1]
    assert dec == [full[0]] + [full[1 + k] for k in keep]
    assert f"every {every} of {n} rows" in out


def test_trace_arrays_equal_csv(cart_dir, cli):
    cli(["run", "s.yaml", "--csv", "a.csv"])
    _, header, rows = _read_csv("a.csv")
    tr = run_scenario(load_scenario("s.yaml"), keep=True).trace
    assert list(tr) == header
    for i, c in enumerate(header):
        csv_col = np.array([float(r[i]) if r[i] else np.nan for r in rows])
        assert np.array_equal(tr[c], csv_col, equal_nan=True), c


def test_interrupted_run_exits_130_with_complete_csv(tmp_path, monkeypatch, cli):
    # 40 001 rows: more than one block of the streaming writer; stop after the first block
    from sim.traces import writer as trace
    monkeypatch.chdir(tmp_path)
    (tmp_path / "cart.yaml").write_text(CART)
    (tmp_path / "long.yaml").write_text("robot: cart.yaml\nstep: 0.001\nduration: 40\nscript:\n"
                                        "  - {at: 0, wheels: {left: 4, right: 5}}\n")
    original = trace.TraceWriter.write_block
    calls = []

    def write_then_interrupt(self, block):
        if calls:
            raise KeyboardInterrupt
        calls.append(len(block))
        return original(self, block)

    monkeypatch.setattr(trace.TraceWriter, "write_block", write_then_interrupt)
    code, out, _ = cli(["run", "long.yaml", "--csv", "part.csv"])
    assert code == 130 and "INTERRUPTED" in out
    assert not (tmp_path / "part.csv.part").exists()
    raw, header, rows = _read_csv("part.csv")
    assert raw.endswith(b"\r\n")
    assert 0 < len(rows) == calls[0] < 40001
    assert all(len(r) == len(header) and "" not in r[:7] for r in rows)
    t = np.array([float(r[0]) for r in rows])
    np.testing.assert_allclose(np.diff(t), 0.001, atol=1e-12)


def test_command_log_replay_equals_script(tmp_path, scenario_from_yaml):
    # The same wheel commands from a CSV log and from a YAML script give the same trace.
    (tmp_path / "cart.yaml").write_text(CART)
    cmds = [(0.0, 3.0, 3.0), (0.25, 3.5, 2.5), (0.8, 4.25, 1.0), (1.3, -1.0, 2.0)]
    (tmp_path / "log.csv").write_text("t,left.spin,right.spin\n" + "".join(f"{t},{a},{b}\n" for t, a, b in cmds))
    script = "".join(f"  - {{at: {t}, wheels: {{left: {a}, right: {{spin: {b}}}}}}}\n" for t, a, b in cmds)
    head = "robot: cart.yaml\nstep: 0.01\nduration: 2\n"
    a = run_scenario(scenario_from_yaml(tmp_path, head + "commands: log.csv\n", "replay.yaml"), keep=True).trace
    b = run_scenario(scenario_from_yaml(tmp_path, head + "script:\n" + script, "script.yaml"), keep=True).trace
    assert list(a) == list(b)
    assert all(np.array_equal(a[c], b[c], equal_nan=True) for c in a)
    # and a twist log against a twist script
    (tmp_path / "tw.csv").write_text("t,vx,omega\n0,0.3,0.0\n0.5,0.3,0.4\n1.5,0.0,-0.2\n")
    tw = "  - {at: 0, twist: {vx: 0.3, omega: 0.0}}\n  - {at: 0.5, twist: {vx: 0.3, omega: 0.4}}\n" \
         "  - {at: 1.5, twist: {vx: 0.0, omega: -0.2}}\n"
    a = run_scenario(scenario_from_yaml(tmp_path, head + "commands: tw.csv\n", "r2.yaml"), keep=True).trace
    b = run_scenario(scenario_from_yaml(tmp_path, head + "script:\n" + tw, "s2.yaml"), keep=True).trace
    assert all(np.array_equal(a[c], b[c], equal_nan=True) for c in a)
    assert np.nanmax(np.abs(a["omega"])) == pytest.approx(0.4)


def test_dense_command_logs_equal_scripts_byte_for_byte(tmp_path, scenario_from_yaml):
    # A log runs in compiled blocks with its commands applied as their steps come; a script runs
    # a stretch per entry.  Commands every step, between steps, and two on one step (the later holds).
    rng = np.random.default_rng(5)
    robot = pathlib.Path(__file__).resolve().parents[1] / "scenarios" / "robots" / "quad-steer.yaml"
    head = f"robot: {robot}\nstep: 0.01\nduration: 3\n"
    t = np.round(np.concatenate([np.arange(0, 1.5, 0.01), [1.503, 1.507, 1.52, 2.0, 2.505]]), 3)
    names = ["front_left", "rear_right"]
    vals = np.round(rng.uniform(-3, 3, (len(t), 4)), 3)
    (tmp_path / "w.csv").write_text("t," + ",".join(f"{n}.spin,{n}.steer" for n in names) + "\n"
                                    + "".join(f"{a}," + ",".join(map(str, v)) + "\n" for a, v in zip(t, vals)))
    script = "".join(f"  - {{at: {a}, wheels: {{{names[0]}: {{spin: {v[0]}, steer: {v[1]}}}, "
                     f"{names[1]}: {{spin: {v[2]}, steer: {v[3]}}}}}}}\n" for a, v in zip(t, vals))
    tw = np.round(rng.uniform(-0.5, 0.5, (len(t), 2)), 3)
    (tmp_path / "t.csv").write_text("t,vy,omega\n" + "".join(f"{a},{v[0]},{v[1]}\n" for a, v in zip(t, tw)))
    twist = "".join(f"  - {{at: {a}, twist: {{vx: 0, vy: {v[0]}, omega: {v[1]}}}}}\n" for a, v in zip(t, tw))
    for log, text in (("w.csv", script), ("t.csv", twist)):
        a = run_scenario(scenario_from_yaml(tmp_path, head + f"commands: {log}\n", "log.yaml"), keep=True).trace
        b = run_scenario(scenario_from_yaml(tmp_path, head + "script:\n" + text, "script.yaml"), keep=True).trace
        assert list(a) == list(b) and len(a["t"]) == 301
        assert all(a[c].tobytes() == b[c].tobytes() for c in a), log


def test_run_json_is_the_summary(cli, tmp_path):
    scen = pathlib.Path(__file__).resolve().parents[1] / "scenarios" / "field-rover-skid-turn.yaml"
    code, out, err = cli(["run", scen, "--json", "--csv", tmp_path / "f.csv"])
    assert code == 0, err
    d = json.loads(out)                                     # one JSON object, nothing else on stdout
    res = run_scenario(load_scenario(scen))
    assert d["rows"] == res.rows == 601 and d["passed"] is True and d["interrupted"] is False
    assert d["final_pose"]["x"] == res.final_pose[0] and d["final_pose"]["theta"] == res.final_pose[2]
    assert d["final_pose"]["theta_deg"] == pytest.approx(math.degrees(res.final_pose[2]), rel=1e-15)
    assert d["peak_slip"] == {"value": res.peak_slip, "t": res.peak_slip_t}
    assert d["distance"] == res.distance
    assert [c["passed"] for c in d["checks"]] == [True, True]
    assert [c["kind"] for c in d["checks"]] == ["slip_above", "slip_above"]
    assert d["checks"][1]["at"] == 2.0 and d["checks"][1]["expected"] == {"threshold": 0.1}
    assert d["checks"][0]["text"] == res.checks[0].text and d["checks"][0]["line"] == res.checks[0].line
    assert d["notes"] == [] and d["warnings"] == [] and d["trace"] == {"path": str(tmp_path / "f.csv"), "every": 1}
    # a failing check: the same exit code as the text summary, and passed false
    bad = tmp_path / "bad.yaml"
    bad.write_text(scen.read_text().replace("robots/", str(scen.parent / "robots") + "/")
                   .replace("slip_above: 0.05", "slip_below: 0.05"))
    code, out, _ = cli(["run", bad, "--json"])
    d = json.loads(out)
    assert code == 1 and d["passed"] is False and [c["passed"] for c in d["checks"]] == [False, True]
    assert cli(["run", bad])[0] == 1
    # against a baseline: its verdict is in the object
    code, out, _ = cli(["run", scen, "--json", "--baseline", tmp_path / "f.csv"])
    d = json.loads(out)
    assert code == 0 and d["baseline"]["status"] == "identical" and d["baseline"]["diverged"] is False
