"""``trundle plot``: reading traces robustly, the figure's content, bad input."""
from __future__ import annotations

import csv
import math

import numpy as np
import pytest

from sim.plot import PATH, figure, plot_traces, read_trace
from sim.runner import run_scenario
from sim.scenario import load_scenario

from conftest import SCENARIOS


@pytest.fixture(scope="module")
def arc_trace(tmp_path_factory):
    d = tmp_path_factory.mktemp("plot")
    res = run_scenario(load_scenario(SCENARIOS / "ward-cart-arc.yaml"), csv=d / "arc.csv", keep=True)
    return d / "arc.csv", res


def test_read_trace_round_trips_the_written_numbers(arc_trace):
    path, res = arc_trace
    tr = read_trace(path)
    assert tr.rows == 1001 and tr.stride == 1 and tr.wheels == ["left", "right", "castor_front", "castor_rear"]
    for c, col in res.trace.items():
        np.testing.assert_array_equal(tr[c], col)                       # blank cells read back as NaN
    assert np.all(np.isnan(tr["left.steer_cmd"]) == np.isnan(res.trace["left.steer_cmd"]))


def test_long_traces_thinned_but_peak_from_every_row(write_files, tmp_path):
    # a hand-made trace: slip peaks once, at a row that thinning would drop
    n, k_peak = 5000, 3777
    lines = ["t,x,y,theta,slip,icr_x"]
    for k in range(n):
        slip = 0.9 if k == k_peak else 0.001 * (k % 7)
        lines.append(f"{k * 0.01!r},{k * 0.001!r},0.0,0.0,{slip!r},")
    p = write_files(tmp_path, {"long.csv": "\n".join(lines) + "\n"})["long.csv"]
    tr = read_trace(p, max_rows=100)
    assert tr.rows == n and tr.stride > 1 and len(tr["t"]) <= 2 * 100 + 1
    assert (tr.peak_slip, tr.peak_t) == (0.9, k_peak * 0.01)
    assert tr["t"][-1] == (n - 1) * 0.01                               # the last row is kept
    steps = np.diff(tr["t"][:-1])
    assert np.allclose(steps, tr.stride * 0.01)                         # evenly spaced
    assert np.all(np.isnan(tr["icr_x"]))


def test_figure_marks_path_end_and_slip_peak(tmp_path):
    res = run_scenario(load_scenario(SCENARIOS / "field-rover-skid-turn.yaml"), csv=tmp_path / "f.csv")
    out = tmp_path / "f.png"
    fig, (tr,) = plot_traces(tmp_path / "f.csv", out)
    # the peak, found independently with the csv module
    with open(tmp_path / "f.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    slip = np.array([float(r["slip"]) for r in rows])
    t = np.array([float(r["t"]) for r in rows])
    assert tr.peak_slip == slip.max() == res.peak_slip and tr.peak_t == t[np.argmax(slip)]
    ax_path, ax_slip = fig.axes[0], fig.axes[1]
    marks = [ln for ln in ax_slip.lines if ln.get_marker() == "v"]
    assert len(marks) == 1 and (marks[0].get_xdata()[0], marks[0].get_ydata()[0]) == (tr.peak_t, tr.peak_slip)
    # the end square sits at the last pose, and the PNG has the path colour at that pixel
    end = [ln for ln in ax_path.lines if ln.get_marker() == "s"][0]
    x_end, y_end = float(rows[-1]["x"]), float(rows[-1]["y"])
    assert (end.get_xdata()[0], end.get_ydata()[0]) == (x_end, y_end)
    from matplotlib.image import imread

    img = imread(out)
    h = img.shape[0]
    px, py = ax_path.transData.transform((x_end, y_end))
    rgb = (img[int(round(h - py)), int(round(px)), :3] * 255).round()
    want = np.array([int(PATH[i:i + 2], 16) for i in (1, 3, 5)])
    assert np.max(np.abs(rgb - want)) <= 8, (rgb, want)
    # ICR points come from the trace's icr columns
    icr = [ln for ln in ax_path.lines if ln.get_marker() == "x"][0]
    assert np.allclose(icr.get_xdata()[0], float(rows[0]["icr_x"]))


def test_compare_overlays_a_second_trace_and_is_deterministic(arc_trace, tmp_path):
    path, _ = arc_trace
    run_scenario(load_scenario(SCENARIOS / "ward-cart-square.yaml"), csv=tmp_path / "sq.csv")
    fig, traces = plot_traces(path, tmp_path / "a.png", compare=tmp_path / "sq.csv")
    paths = [ln for ln in fig.axes[0].lines if ln.get_linestyle() in ("-", ":") and len(ln.get_xdata()) > 10]
    assert len(paths) == 2
    np.testing.assert_array_equal(paths[1].get_xdata(), traces[1]["x"])
    plot_traces(path, tmp_path / "b.png", compare=tmp_path / "sq.csv")
    assert (tmp_path / "a.png").read_bytes() == (tmp_path / "b.png").read_bytes()


def test_plot_cli(cli, arc_trace, tmp_path):
    path, _ = arc_trace
    code, out, err = cli(["plot", path, "-o", tmp_path / "p.png"])
    assert code == 0, err
    assert (tmp_path / "p.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "1001 rows" in out


HEAD = "t,x,y,theta,slip"


@pytest.mark.parametrize("text, line, fragment", [
    ("", 1, "empty file"),
    ("t,x,y,slip\n0,0,0,0\n", 1, "missing column(s) theta"),
    ("t,x,y,x,theta\n0,0,0,0,0\n", 1, "column 'x' appears twice"),
    (HEAD + "\n", 2, "no rows"),
    (HEAD + "\n0,0,0,0,0\n0.01,abc,0,0,0\n", 3, "column 'x': expected a number or a blank cell, got 'abc'"),
    (HEAD + "\n0,0,0,0\n", 2, "expected 5 cells, got 4"),
    (HEAD + "\n0,inf,0,0,0\n", 2, "expected a finite number"),
    (HEAD + "\n,0,0,0,0\n", 2, "column 't' is blank"),
    (HEAD + '\n0,"0\n', 2, "expected 5 cells, got 2"),
    (HEAD + "\n0,0,0,0,0\n0.01,\xe9,0,0,0\n", 3, "not plain text"),
])
def test_bad_traces(cli, expect_input_error, write_files, tmp_path, text, line, fragment):
    p = write_files(tmp_path, {"bad.csv": text})["bad.csv"]
    code, out, err = cli(["plot", p, "-o", tmp_path / "out.png"])
    expect_input_error(code, err, p, line, fragment)
    assert sorted(q.name for q in tmp_path.iterdir()) == ["bad.csv"]  # no picture, no .part


def test_missing_trace_and_output_directory(cli, expect_input_error, arc_trace, tmp_path):
    code, _, err = cli(["plot", tmp_path / "nope.csv", "-o", tmp_path / "o.png"])
    expect_input_error(code, err, tmp_path / "nope.csv", None, "file not found")
    path, _ = arc_trace
    code, _, err = cli(["plot", path, "-o", tmp_path / "no" / "o.png"])
    expect_input_error(code, err, "-o", None, "does not exist")


def test_figure_without_steering_says_so(arc_trace):
    path, _ = arc_trace
    tr = read_trace(path)
    fig = figure([tr])
    steer_ax = fig.axes[4]
    # castors swivel on the arc, so the arc has steering curves; a trace of fixed wheels has none
    assert any(ln.get_label() == "castor_front" for ln in steer_ax.lines)
    tr.data = {k: v for k, v in tr.data.items() if not k.startswith("castor")}
    tr.wheels = ["left", "right"]
    texts = [t.get_text() for t in figure([tr]).axes[4].texts]
    assert texts == ["no wheel changes its angle"] and not math.isnan(tr.peak_slip)
