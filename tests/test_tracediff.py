"""Trace comparison (`trundle diff`, sim.traces.diff) and baselines (`trundle run --baseline`)."""
from __future__ import annotations

import csv
import json
import math

import numpy as np
import pytest
from scipy.optimize import brentq

from sim.traces.diff import compare

R = 0.08           # m, wheel radius of the test axle
TRACK = 0.44       # m, distance between the wheels
WL, WR = 4.0, 5.0  # rad/s, constant spins
STEP = 0.01


def axle_scenario(right_y: float, duration: float = 10.0) -> str:
    """Two fixed wheels, no acceleration limits, constant spins: an exact arc."""
    return f"""\
        robot:
          name: axle
          wheels:
            - {{name: left, type: fixed, x: 0.0, y: {TRACK / 2!r}, radius: {R}}}
            - {{name: right, type: fixed, x: 0.0, y: {right_y!r}, radius: {R}}}
        step: {STEP}
        duration: {duration}
        script:
          - {{at: 0, wheels: {{left: {WL}, right: {WR}}}}}
        """


def arc_pose(track: float, offset: float, t):
    """Closed-form pose of the body origin of a differential drive (common practice).

    v_mid = r (wR + wL) / 2 and omega = r (wR - wL) / track at the axle midpoint;
    the body origin sits ``offset`` to the left of the midpoint, so its speed
    is v_mid - omega * offset (rigid body, common practice).  Starting at the
    origin heading +x: x = v/w sin(w t), y = v/w (1 - cos(w t)), theta = w t.
    """
    w = R * (WR - WL) / track
    v = R * (WR + WL) / 2 - w * offset
    return v / w * np.sin(w * t), v / w * (1 - np.cos(w * t)), w * t


@pytest.fixture
def axle_pair(tmp_path, write_files, cli):
    """Traces of the axle and of the same axle with the right wheel moved 1 mm outward."""
    files = write_files(tmp_path, {"a.yaml": axle_scenario(-TRACK / 2), "b.yaml": axle_scenario(-TRACK / 2 - 0.001)})
    for name in ("a", "b"):
        code, out, err = cli(["run", files[f"{name}.yaml"], "--csv", tmp_path / f"{name}.csv"])
        assert code == 0, err
    return tmp_path / "a.csv", tmp_path / "b.csv"


def read_rows(path):
    """All rows of a CSV file with the csv module (the plain reading)."""
    with open(path, newline="") as fh:
        return list(csv.reader(fh))


def write_csv(path, header, rows):
    """A trace by hand: rows of cells (str or float), CRLF line ends like the writer."""
    lines = [",".join(header)] + [",".join(c if isinstance(c, str) else repr(c) for c in r) for r in rows]
    path.write_bytes(("\r\n".join(lines) + "\r\n").encode())
    return path


# -- identical and diverged runs -------------------------------------------------
def test_identical_runs_diff_clean(tmp_path, cli, repo_root):
    scen = repo_root / "scenarios" / "ward-cart-castor-settle.yaml"
    for name in ("a", "b"):
        assert cli(["run", scen, "--csv", tmp_path / f"{name}.csv"])[0] == 0
    code, out, err = cli(["diff", tmp_path / "a.csv", tmp_path / "b.csv"])
    assert code == 0, err
    assert "result    IDENTICAL" in out
    assert "position 0 m, heading 0 deg" in out
    code, out, _ = cli(["diff", tmp_path / "a.csv", tmp_path / "b.csv", "--json"])
    rep = json.loads(out)
    assert code == 0 and rep["status"] == "identical"
    # the ICR columns of this straight pull are blank in most rows: blank equals blank
    rows = read_rows(tmp_path / "a.csv")
    icr = rows[0].index("icr_x")
    assert sum(r[icr] == "" for r in rows[1:]) > 100
    assert rep["columns"]["icr_x"]["max_deviation"] == 0.0


def test_one_millimetre_wheel_shift_first_divergence_matches_closed_form(axle_pair, cli):
    a, b = axle_pair
    tol = 1e-4
    t = np.arange(int(round(10 / STEP)) + 1) * STEP
    xa, ya, tha = arc_pose(TRACK, 0.0, t)
    xb, yb, thb = arc_pose(TRACK + 0.001, 0.0005, t)     # midpoint moved 0.5 mm right of the origin
    f = np.maximum(np.abs(xb - xa), np.abs(yb - ya))
    k = int(np.argmax(f > tol))
    # the crossing is well clear of grid rounding, and lies in (t_{k-1}, t_k]
    assert f[k] - tol > 1e-7 and tol - f[k - 1] > 1e-7
    g = lambda s: max(abs(a_ - b_) for a_, b_ in zip(arc_pose(TRACK, 0.0, s)[:2],
                                                        arc_pose(TRACK + 0.001, 0.0005, s)[:2])) - tol
    t_star = brentq(g, t[k - 1], t[k])
    assert t[k - 1] < t_star <= t[k]

    code, out, err = cli(["diff", a, b, "--columns", "x,y", "--tol", str(tol), "--json"])
    assert code == 1, err
    rep = json.loads(out)
    first = rep["first_divergence"]
    assert first["row"] == k and first["t"] == pytest.approx(t[k], abs=1e-12)
    got = {c["column"]: c["deviation"] for c in first["columns"]}
    want = {"x": abs(xb[k] - xa[k]), "y": abs(yb[k] - ya[k])}
    for name, dev in got.items():
        assert dev == pytest.approx(want[name], abs=1e-10)
    assert set(got) == {n for n in want if want[n] > tol}
    # largest deviations and final pose against the closed form too
    assert rep["columns"]["x"]["max_deviation"] == pytest.approx(np.max(np.abs(xb - xa)), abs=1e-10)
    assert rep["columns"]["y"]["max_deviation"] == pytest.approx(np.max(np.abs(yb - ya)), abs=1e-10)
    assert rep["columns"]["y"]["t"] == pytest.approx(t[np.argmax(np.abs(yb - ya))], abs=1e-12)
    assert rep["final"]["position"] == pytest.approx(math.hypot(xb[-1] - xa[-1], yb[-1] - ya[-1]), abs=1e-10)
    assert rep["final"]["heading_deg"] == pytest.approx(abs(math.degrees(thb[-1] - tha[-1])), abs=1e-8)

    # heading alone: theta_b - theta_a = d_omega t grows linearly; first row past 1e-3 rad
    d_omega = R * (WR - WL) * (1 / TRACK - 1 / (TRACK + 0.001))
    k_theta = math.floor(1e-3 / d_omega / STEP) + 1
    code, out, _ = cli(["diff", a, b, "--columns", "theta", "--tol", "theta=1e-3", "--json"])
    assert code == 1
    assert json.loads(out)["first_divergence"]["row"] == k_theta

    # all columns at the default 1e-9: omega differs from the first row on
    code, out, _ = cli(["diff", a, b, "--json"])
    first = json.loads(out)["first_divergence"]
    assert first["row"] == 0
    omega = {c["column"]: c for c in first["columns"]}["omega"]
    assert omega["deviation"] == pytest.approx(d_omega, rel=1e-9)


def test_chunk_size_does_not_change_the_report(axle_pair):
    a, b = axle_pair
    big = compare(a, b, 1e-6).to_dict()
    for chunk in (64, 1000, 4096):
        assert compare(a, b, 1e-6, chunk_bytes=chunk).to_dict() == big


def test_largest_deviations_match_a_plain_reading(axle_pair):
    """Reference: the csv module and float(), cell by cell, written out here."""
    a, b = axle_pair
    ra = read_rows(a)
    rb = read_rows(b)
    header = ra[0]
    rep = compare(a, b, 1e-9)
    by = {c.name: c for c in rep.compared}
    for j, name in enumerate(header):
        devs = []
        for row_a, row_b in zip(ra[1:], rb[1:]):
            ca, cb = row_a[j], row_b[j]
            if ca == "" and cb == "":
                devs.append(0.0)
            elif ca == "" or cb == "":
                devs.append(math.inf)
            else:
                d = float(cb) - float(ca)
                if name == "theta" or name.endswith((".steer", ".steer_cmd")):
                    d = math.remainder(d, 2 * math.pi)
                devs.append(abs(d))
        assert by[name].max_deviation == pytest.approx(max(devs), rel=1e-12, abs=1e-15), name


# -- tolerance edges, headings, blanks -------------------------------------------
HEAD = ["t", "x", "y", "theta", "icr_x"]


def test_tolerance_edges_just_inside_and_just_outside(tmp_path, cli):
    rows = [[0.0, 1.0, 0.0, 0.0, ""], [0.01, 1.0, 0.0, 0.0, ""], [0.02, 1.0, 0.0, 0.0, ""]]
    a = write_csv(tmp_path / "a.csv", HEAD, rows)
    rows[2][1] = 1.5                                    # |1.5 - 1.0| = 0.5 exactly in binary
    b = write_csv(tmp_path / "b.csv", HEAD, rows)
    code, out, _ = cli(["diff", a, b, "--tol", "x=0.5"])
    assert code == 0 and "WITHIN TOLERANCE" in out
    code, out, _ = cli(["diff", a, b, "--tol", f"x={math.nextafter(0.5, 0.0)!r}", "--json"])
    assert code == 1
    first = json.loads(out)["first_divergence"]
    assert first["row"] == 2 and first["t"] == 0.02 and first["columns"][0]["column"] == "x"
    assert first["columns"][0]["deviation"] == 0.5
    # the default applies to the other columns; a later --tol for the same column wins
    assert cli(["diff", a, b, "--tol", "1", "--tol", "x=0.1"])[0] == 1
    assert cli(["diff", a, b, "--tol", "x=0.1", "--tol", "x=0.6"])[0] == 0


def test_heading_columns_wrap_modulo_two_pi(tmp_path, cli):
    a = write_csv(tmp_path / "a.csv", ["t", "x", "theta", "left.steer"],
                  [[0.0, 0.0, 0.25, 3.0], [0.01, 0.0, 0.25, 3.0]])
    b = write_csv(tmp_path / "b.csv", ["t", "x", "theta", "left.steer"],
                  [[0.0, 0.0, 0.25 + 2 * math.pi, -3.0], [0.01, 0.0, 0.25 - 4 * math.pi, -3.0]])
    wrapped = 2 * math.pi - 6.0      # angle between 3 rad and -3 rad the short way round
    code, out, _ = cli(["diff", a, b, "--tol", "theta=1e-12", "--tol", f"left.steer={wrapped + 1e-12!r}", "--json"])
    rep = json.loads(out)
    assert code == 0 and rep["status"] == "within tolerance"
    assert rep["columns"]["left.steer"]["max_deviation"] == pytest.approx(wrapped, abs=1e-14)
    assert cli(["diff", a, b, "--tol", f"left.steer={wrapped - 1e-9!r}"])[0] == 1
    # degrees are accepted for heading tolerances: 0.2832 rad = 16.23 deg
    assert cli(["diff", a, b, "--tol", "theta=1e-12", "--tol", "left.steer=16.3 deg"])[0] == 0
    assert cli(["diff", a, b, "--tol", "theta=1e-12", "--tol", "left.steer=16.2 deg"])[0] == 1
    # a column that is not a heading gets no wrapping
    c = write_csv(tmp_path / "c.csv", ["t", "x", "theta", "left.steer"],
                  [[0.0, 2 * math.pi, 0.25, 3.0], [0.01, 0.0, 0.25, 3.0]])
    code, out, _ = cli(["diff", a, c, "--json", "--tol", "0.1"])
    assert code == 1 and json.loads(out)["columns"]["x"]["max_deviation"] == 2 * math.pi


def test_blank_and_nan_cells(tmp_path, cli):
    a = write_csv(tmp_path / "a.csv", HEAD, [[0.0, 0.0, 0.0, 0.0, ""], [0.01, 0.0, 0.0, 0.0, ""],
                                             [0.02, 0.0, 0.0, 0.0, 2.0]])
    same = write_csv(tmp_path / "same.csv", HEAD, [[0.0, 0.0, 0.0, 0.0, "nan"], [0.01, 0.0, 0.0, 0.0, ""],
                                                   [0.02, 0.0, 0.0, 0.0, "2.0"]])
    code, out, _ = cli(["diff", a, same, "--json"])
    assert code == 0 and json.loads(out)["status"] == "identical"     # same values, other spelling
    b = write_csv(tmp_path / "b.csv", HEAD, [[0.0, 0.0, 0.0, 0.0, ""], [0.01, 0.0, 0.0, 0.0, 1.5],
                                             [0.02, 0.0, 0.0, 0.0, ""]])
    code, out, _ = cli(["diff", a, b, "--json", "--tol", "1e6"])
    rep = json.loads(out)
    assert code == 1
    assert rep["first_divergence"]["row"] == 1
    col = rep["first_divergence"]["columns"][0]
    assert col["column"] == "icr_x" and col["blank_mismatch"] and col["deviation"] is None
    assert rep["columns"]["icr_x"]["blank_mismatch"] == 2
    code, out, _ = cli(["diff", a, b])
    assert "blank vs number" in out


# -- structure differences --------------------------------------------------------
def test_rows_columns_and_times_reported_plainly(tmp_path, cli):
    rows = [[k * 0.01, 0.1 * k, 0.0, 0.0, ""] for k in range(5)]
    a = write_csv(tmp_path / "a.csv", HEAD, rows)
    short = write_csv(tmp_path / "short.csv", HEAD, rows[:3])
    code, out, _ = cli(["diff", a, short])
    assert code == 1 and "A has 5, B has 3" in out
    assert "compared 3 rows at times in both; 2 only in A (t = 0.03, 0.04 s); none only in B" in out
    assert "do not start and end at shared times" in out
    fewer = write_csv(tmp_path / "fewer.csv", HEAD[:-1], [r[:-1] for r in rows])
    code, out, _ = cli(["diff", a, fewer])
    assert code == 1 and "only in A: icr_x" in out
    assert cli(["diff", a, fewer, "--columns", "t,x,y,theta"])[0] == 0
    # half the step, the same x per row: at the shared times 0.01 and 0.02 s, x differs
    half = write_csv(tmp_path / "half.csv", HEAD, [[k * 0.005] + r[1:] for k, r in enumerate(rows)])
    code, out, _ = cli(["diff", a, half, "--json", "--tol", "1e-3"])
    rep = json.loads(out)
    assert code == 1 and rep["a"]["step"] == 0.01 and rep["b"]["step"] == 0.005
    assert rep["times"]["matched"] == 3 and not rep["times"]["ends_matched"]
    assert rep["times"]["only_a"] == {"count": 2, "first": [0.03, 0.04], "last": 0.04}
    assert rep["times"]["only_b"] == {"count": 2, "first": [0.005, 0.015], "last": 0.015}
    first = rep["first_divergence"]
    assert first["row"] == 1 and first["t"] == 0.01 and first["t_b"] == 0.01
    assert first["columns"][0]["column"] == "x" and first["columns"][0]["deviation"] == pytest.approx(0.1)


def test_different_grids_compare_at_shared_times(tmp_path, cli):
    """Every other row of A, and A on a finer grid with values between: within tolerance at the shared times."""
    rows = [[k * 0.01, math.sin(k * 0.01), 0.0, 7.0 * k * 0.01, ""] for k in range(11)]
    a = write_csv(tmp_path / "a.csv", HEAD, rows)
    thin = write_csv(tmp_path / "thin.csv", HEAD, rows[::2])
    code, out, _ = cli(["diff", a, thin])
    assert code == 0 and "WITHIN TOLERANCE" in out
    assert "compared 6 rows at times in both; 5 only in A (t = 0.01, 0.03, 0.05, 0.07, 0.09 s); none only in B" in out
    code, out, _ = cli(["diff", thin, a, "--json"])
    rep = json.loads(out)
    assert code == 0 and rep["status"] == "within tolerance" and rep["times"]["only_b"]["count"] == 5
    # a finer grid: 0.005 s steps (k * 0.005 hits k/2 * 0.01 exactly for even k), other values between
    fine = [[k * 0.005, math.sin(k * 0.005) if k % 2 == 0 else 99.0, 0.0, 7.0 * k * 0.005, ""] for k in range(21)]
    code, out, _ = cli(["diff", a, write_csv(tmp_path / "fine.csv", HEAD, fine), "--json"])
    rep = json.loads(out)
    assert code == 0 and rep["times"]["matched"] == 11 and rep["times"]["only_b"]["count"] == 10
    assert rep["columns"]["x"]["max_deviation"] <= 1e-15
    # the same at shared times but one value off: diverged there, with A's row and time
    rows[6][1] += 1e-3
    code, out, _ = cli(["diff", write_csv(tmp_path / "a2.csv", HEAD, rows), thin, "--json"])
    rep = json.loads(out)
    assert code == 1 and rep["first_divergence"]["row"] == 6 and rep["first_divergence"]["t"] == 0.06


def test_time_must_be_a_number_and_increase(tmp_path, cli, expect_input_error):
    a = write_csv(tmp_path / "a.csv", HEAD, [[k * 0.01, 0.0, 0.0, 0.0, ""] for k in range(4)])
    back = write_csv(tmp_path / "back.csv", HEAD, [[0.0, 0.0, 0.0, 0.0, ""], [0.02, 0.0, 0.0, 0.0, ""],
                                                   [0.01, 0.0, 0.0, 0.0, ""]])
    code, _, err = cli(["diff", a, back])
    expect_input_error(code, err, back, 4, "column 't' must increase")
    blank = write_csv(tmp_path / "blank.csv", HEAD, [[0.0, 0.0, 0.0, 0.0, ""], ["", 0.0, 0.0, 0.0, ""]])
    code, _, err = cli(["diff", blank, a])
    expect_input_error(code, err, blank, 3, "column 't' is blank")


def test_bad_options_are_input_errors(tmp_path, cli, expect_input_error):
    a = write_csv(tmp_path / "a.csv", HEAD, [[0.0, 0.0, 0.0, 0.0, ""]])
    code, _, err = cli(["diff", a, a, "--tol", "thetaa=1e-3"])
    expect_input_error(code, err, "--tol", None, "did you mean 'theta'")
    code, _, err = cli(["diff", a, a, "--tol", "x=-1"])
    expect_input_error(code, err, "--tol", None, ">= 0")
    code, _, err = cli(["diff", a, a, "--columns", "z"])
    expect_input_error(code, err, "--columns", None, "'z'")
    code, _, err = cli(["diff", a, tmp_path / "missing.csv"])
    expect_input_error(code, err, tmp_path / "missing.csv", None, "not found")


# -- bad files ---------------------------------------------------------------------
def test_truncated_trace_is_input_error_with_line(axle_pair, tmp_path, cli, expect_input_error):
    a, _ = axle_pair
    data = a.read_bytes()
    cut = tmp_path / "cut.csv"
    cut.write_bytes(data[: len(data) // 2])          # ends inside a row
    lines = data[: len(data) // 2].count(b"\n") + 1
    code, out, err = cli(["diff", a, cut])
    expect_input_error(code, err, cut, lines, "truncated")
    assert out == ""
    # the same with a small chunk size in the library (the cut row in a later chunk)
    from sim.errors import InputError
    with pytest.raises(InputError) as exc:
        compare(a, cut, chunk_bytes=300)
    assert exc.value.line == lines


@pytest.mark.parametrize("line, text, fragment", [
    (4, b"0.02,abc,0,0,\r\n", "column 'x': expected a number"),
    (3, b"0.01,1.2.3,0,0,\r\n", "column 'x': expected a number"),
    (5, b"0.03,0,0,0\r\n", "expected 5 cells, got 4"),
    (3, b"\r\n", "blank line"),
])
def test_malformed_trace_is_input_error_with_line(tmp_path, cli, expect_input_error, line, text, fragment):
    rows = [[k * 0.01, 0.0, 0.0, 0.0, ""] for k in range(6)]
    a = write_csv(tmp_path / "a.csv", HEAD, rows)
    lines = a.read_bytes().split(b"\r\n")
    lines[line - 1] = text.rstrip(b"\r\n")
    bad = tmp_path / "bad.csv"
    bad.write_bytes(b"\r\n".join(lines))
    code, _, err = cli(["diff", a, bad])
    expect_input_error(code, err, bad, line, fragment)
    code, _, err = cli(["diff", bad, a])       # as the reference too
    expect_input_error(code, err, bad, line, fragment)


@pytest.mark.parametrize("content, fragment", [
    (b"", "empty file"),
    (b"x,y\r\n1,2\r\n", "no column 't'"),
    (b"t,x,x\r\n0,1,2\r\n", "appears twice"),
])
def test_bad_header_is_input_error_line_1(tmp_path, cli, expect_input_error, content, fragment):
    bad = tmp_path / "bad.csv"
    bad.write_bytes(content)
    code, _, err = cli(["diff", bad, bad])
    expect_input_error(code, err, bad, 1, fragment)


def test_quoted_cells_and_missing_last_line_end_are_read(tmp_path, cli):
    """RFC 4180 allows quoted fields and a last record without a line break."""
    a = write_csv(tmp_path / "a.csv", ["t", "x"], [[0.0, 1.0], [0.01, 2.0]])
    b = tmp_path / "b.csv"
    b.write_bytes(b'"t","x"\r\n"0.0","1.0"\r\n0.01,2.0')
    code, out, err = cli(["diff", a, b, "--json"])
    assert code == 0, err
    assert json.loads(out)["b"]["rows"] == 2


# -- baselines: sidecar metadata and run --baseline -----------------------------------
def test_sidecar_beside_csv_and_csv_stays_plain(tmp_path, cli, repo_root):
    from sim.files.scenario import load_scenario
    scen_path = repo_root / "scenarios" / "ward-cart-arc.yaml"
    out_csv = tmp_path / "arc.csv"
    assert cli(["run", scen_path, "--csv", out_csv, "--every", "3"])[0] == 0
    meta = json.loads((tmp_path / "arc.csv.meta.json").read_text())
    scen = load_scenario(scen_path)
    assert meta["scenario_hash"] == scen.scenario_hash and meta["robot_hash"] == scen.robot_hash
    assert meta["step"] == 0.01 and meta["every"] == 3
    import sim
    assert meta["trundle"] == sim.__version__
    rows = read_rows(out_csv)
    assert rows[0] == meta["columns"]
    assert len(rows) - 1 == meta["rows"] == len(range(0, 1001, 3)) + 1     # every 3rd row and the last
    assert all(len(r) == len(rows[0]) for r in rows)
    assert not list(tmp_path.glob("*.part"))


def test_run_against_baseline(tmp_path, cli, write_files):
    robot = """\
        name: axle
        wheels:
          - {name: left, type: fixed, x: 0.0, y: 0.22, radius: 0.08}
          - {name: right, type: fixed, x: 0.0, y: -0.22, radius: 0.08}
        """
    scen = """\
        robot: robot.yaml
        step: 0.01
        duration: 2
        script:
          - {at: 0, wheels: {left: 4.0, right: 5.0}}
        """
    files = write_files(tmp_path, {"robot.yaml": robot, "s.yaml": scen})
    base = tmp_path / "base.csv"
    assert cli(["run", files["s.yaml"], "--csv", base])[0] == 0
    code, out, err = cli(["run", files["s.yaml"], "--baseline", base])
    assert code == 0, err
    assert "IDENTICAL" in out
    assert not list(tmp_path.glob("*.part"))
    # the robot changes (right wheel 1 mm outward): diverged, the robot named as the likely cause
    write_files(tmp_path, {"robot.yaml": robot.replace("y: -0.22", "y: -0.221")})
    code, out, _ = cli(["run", files["s.yaml"], "--baseline", base])
    assert code == 1
    assert "DIVERGED" in out and "likely cause: the robot changed" in out
    assert "scenario file changed" not in out
    # the scenario changes instead
    write_files(tmp_path, {"robot.yaml": robot, "s.yaml": scen.replace("right: 5.0", "right: 5.001")})
    code, out, _ = cli(["run", files["s.yaml"], "--baseline", base])
    assert code == 1 and "likely cause: the scenario file changed" in out
    # a loose tolerance accepts the small change; --csv keeps the new trace
    code, out, _ = cli(["run", files["s.yaml"], "--baseline", base, "--tol", "0.01", "--csv", tmp_path / "new.csv"])
    assert code == 0 and "WITHIN TOLERANCE" in out
    assert (tmp_path / "new.csv").is_file() and (tmp_path / "new.csv.meta.json").is_file()


def test_bad_cell_far_into_a_file_is_found_with_its_line(axle_pair, tmp_path, expect_input_error, cli):
    """Reference: the line numbers of the file as written here."""
    a, b = axle_pair
    lines = b.read_bytes().split(b"\r\n")
    lines[900] = lines[900].replace(b",", b",x", 1)
    bad = tmp_path / "bad.csv"
    bad.write_bytes(b"\r\n".join(lines))
    from sim.errors import InputError
    for chunk in (300, 1 << 20):
        with pytest.raises(InputError) as exc:
            compare(a, bad, chunk_bytes=chunk)
        assert (exc.value.source, exc.value.line) == (str(bad), 901)
        assert "column 'x': expected a number or a blank cell, got 'x" in exc.value.message
    code, _, err = cli(["diff", bad, a, "--jobs", "1"])
    expect_input_error(code, err, bad, 901, "column 'x'")


def test_polars_and_the_careful_reading_agree(tmp_path, monkeypatch):
    """Blanks, quotes, spaces, signs, exponents, long and tiny numbers, CR LF and LF: one report
    whether polars or the cell-by-cell reading parses the pages.

    Reference for the deviations: the csv module and float(), cell by cell (as above).
    """
    from sim.traces.read import TraceReader

    header = ["t", "x", "y", "theta", "icr_x"]
    cells_a = ["0.5", "-0.0", "1e-05", "", "+2.5", "1.5E+3", ".25", "7.", "123456789012345678901234",
               "5e-324", "1.7976931348623157e308", "2.2250738585072014e-308", "0.1", "-3.25e-7", "nan", "inf"]
    cells_b = ["0.5000000000000001", "0.0", "1.0000000000000001e-05", "3.5", "2.5", "1500", "0.25", "7",
               "123456789012345678901235", "1e-323", "1.7976931348623155e308", "2.225073858507201e-308",
               "0.10000000000000002", "-3.2500000000000005e-07", "", "inf"]
    rng = np.random.default_rng(7)
    rows_a, rows_b = [], []
    for k in range(400):
        ra = [repr(k * 0.01)] + [cells_a[(k * 3 + j) % len(cells_a)] for j in range(4)]
        rb = list(ra)
        if k % 3:                                           # two of three rows differ somewhere
            j = 1 + int(rng.integers(4))
            rb[j] = cells_b[cells_a.index(ra[j])]
        if k == 200:
            rb[2] = '"' + rb[2] + '"'                       # a quoted cell: polars' page is declined
        if k == 300:
            rb[3] = " " + rb[3] + " "                       # spaces around a number, likewise
        rows_a.append(ra)
        rows_b.append(rb)
    a, b = tmp_path / "a.csv", tmp_path / "b.csv"
    a.write_bytes(("\r\n".join([",".join(header)] + [",".join(r) for r in rows_a]) + "\r\n").encode())
    b.write_bytes(("\n".join([",".join(header)] + [",".join(r) for r in rows_b]) + "\n").encode())

    parsed = []
    real = TraceReader.parse
    monkeypatch.setattr(TraceReader, "parse", lambda self, *a: parsed.append(1) or real(self, *a))
    fast = compare(a, b, 1e-9, chunk_bytes=2000).to_dict()
    assert len(parsed) > 10                                  # polars did the work
    monkeypatch.setattr(TraceReader, "parse", lambda self, *a: None)
    careful = compare(a, b, 1e-9, chunk_bytes=2000).to_dict()
    assert fast == careful

    def value(c):
        c = c.strip().strip('"').strip()
        return math.nan if c == "" else float(c)

    def dev(x, y, j):
        x, y = value(x), value(y)
        if math.isnan(x) and math.isnan(y) or x == y:
            return 0.0
        if math.isnan(x) or math.isnan(y) or not math.isfinite(y - x):
            return math.inf
        d = y - x
        return abs(math.remainder(d, 2 * math.pi)) if header[j] == "theta" else abs(d)

    for j, name in enumerate(header[1:], start=1):
        devs = [dev(ra[j], rb[j], j) for ra, rb in zip(rows_a, rows_b)]
        want = max(devs)
        got = fast["columns"][name]
        assert (got["max_deviation"] if got["max_deviation"] is not None else math.inf) == want, name
        if math.isfinite(want) and want > 0:
            assert got["row"] == devs.index(want)
