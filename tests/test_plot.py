"""``trundle plot``: reading traces robustly, the figure's content, bad input."""
from __future__ import annotations

import csv
import math

import numpy as np
import pytest

from sim.view.plot import PATH, figure, plot_traces, read_trace
from sim.runs.runner import run_scenario
from sim.files.scenario import load_scenario

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
    ax_path, ax_slip = fig.trundle_axes["path"], fig.trundle_axes["slip"]
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
    steer_ax = fig.trundle_axes["steer"]
    # castors swivel on the arc, so the arc has steering curves; a trace of fixed wheels has none
    assert any(ln.get_label() == "castor_front" for ln in steer_ax.lines)
    tr.data = {k: v for k, v in tr.data.items() if not k.startswith("castor")}
    tr.wheels = ["left", "right"]
    texts = [t.get_text() for t in figure([tr]).trundle_axes["steer"].texts]
    assert texts == ["none: no wheel changes its angle"] and not math.isnan(tr.peak_slip)


def _write_trace(path, cols):
    """A hand-made trace: ``cols`` maps column name -> list of numbers (None = blank cell)."""
    names = list(cols)
    n = len(cols[names[0]])
    lines = [",".join(names)]
    for k in range(n):
        lines.append(",".join("" if cols[c][k] is None else repr(float(cols[c][k])) for c in names))
    path.write_text("\n".join(lines) + "\n")
    return path


def _hand_cols(n=41, wheels=("left",), icr=None):
    t = np.linspace(0.0, 4.0, n)
    cols = {"t": t, "x": 0.5 * t, "y": 0.1 * t ** 2, "theta": 0.2 * t,
            "vx": 0.5 * np.sin(t) + 0.15, "vy": np.zeros(n), "omega": -0.9 * np.sin(t) ** 2 + 0.05,
            "cmd_vx": np.full(n, 0.5), "cmd_vy": np.zeros(n), "cmd_omega": np.full(n, -0.5),
            "slip": np.zeros(n), "icr_x": [None] * n, "icr_y": [None] * n}
    for i, (ix, iy) in (icr or {}).items():
        cols["icr_x"][i], cols["icr_y"][i] = ix, iy
    for w in wheels:
        cols[f"{w}.spin_cmd"] = np.full(n, 3.0)
        cols[f"{w}.spin"] = 3.0 * np.tanh(t)
    return cols


def _vertices_under_legend(ax, axes=None):
    """Display points of ``axes``' line vertices (finite ones) that fall inside ``ax``'s legend box."""
    leg = ax.get_legend()
    bb = leg.get_window_extent(ax.figure.canvas.get_renderer())
    hits = 0
    for a in axes or (ax,):
        for ln in a.lines:
            xy = np.column_stack([ln.get_xdata(), ln.get_ydata()]).astype(float)
            xy = xy[np.all(np.isfinite(xy), axis=1)]
            if len(xy):
                d = a.transData.transform(xy)
                hits += int(np.sum((d[:, 0] >= bb.x0) & (d[:, 0] <= bb.x1) & (d[:, 1] >= bb.y0) & (d[:, 1] <= bb.y1)))
    return hits


@pytest.mark.parametrize("scenario", ["ward-cart-square", "quad-steer-dogleg"])
def test_legends_cover_no_data(tmp_path, scenario):
    # the omega pulses of the square and vy of the dogleg used to run under the twist legend
    run_scenario(load_scenario(SCENARIOS / f"{scenario}.yaml"), csv=tmp_path / "t.csv")
    fig, _ = plot_traces(tmp_path / "t.csv", tmp_path / "t.png")
    ax = fig.trundle_axes
    for name in ("path", "velocity", "turn", "spin", "steer"):
        assert _vertices_under_legend(ax[name]) == 0, name
    # and the check can fail: the same legend moved to the middle of the panel covers data
    ax["velocity"].get_legend().set_loc("center")
    fig.canvas.draw()
    assert _vertices_under_legend(ax["velocity"]) > 0


def test_vx_and_omega_never_hide_each_other(tmp_path):
    # a constant 0.5 m/s beside a constant 0.5 rad/s: on twin axes sharing a zero and each scaled to
    # its own maximum the two lines used to land on the same pixels
    n = 41
    cols = _hand_cols(n)
    cols.update({"vx": np.full(n, 0.5), "omega": np.full(n, 0.5), "cmd_vx": np.full(n, 0.5),
                 "cmd_omega": np.full(n, 0.5)})
    p = _write_trace(tmp_path / "h.csv", cols)
    fig, _ = plot_traces(p, tmp_path / "h.png")
    ax_v, ax_w = fig.trundle_axes["velocity"], fig.trundle_axes["turn"]
    vx = next(ln for ln in ax_v.lines if ln.get_label().startswith("vx"))
    om = next(ln for ln in ax_w.lines if ln.get_label().startswith("omega"))
    pv = ax_v.transData.transform(np.column_stack([vx.get_xdata(), vx.get_ydata()]))
    pw = ax_w.transData.transform(np.column_stack([om.get_xdata(), om.get_ydata()]))
    assert np.min(np.abs(pv[:, 1][:, None] - pw[:, 1][None, :])) > 50          # px apart, always
    assert not ax_v.bbox.overlaps(ax_w.bbox)                                    # panels of their own
    # both show in the picture: pixels of each colour (read back from the PNG)
    from matplotlib.image import imread
    rgb = (imread(tmp_path / "h.png")[:, :, :3] * 255).round().astype(int)
    for line in (vx, om):
        want = np.array([int(line.get_color()[i:i + 2], 16) for i in (1, 3, 5)])
        assert int(np.all(np.abs(rgb - want) <= 8, axis=2).sum()) > 300, line.get_label()
    # both axes show all their data
    for ax, col in ((ax_v, cols["vx"]), (ax_w, cols["omega"])):
        lo, hi = ax.get_ylim()
        assert lo < 0.0 < col.min() and col.max() < hi


def test_identical_wheels_are_one_entry_and_different_ones_are_not(tmp_path):
    from sim.view.plot import identical_groups
    a, b = np.array([1.0, np.nan, 2.0]), np.array([1.0, np.nan, 2.0 + 1e-13])
    assert identical_groups(["a", "b", "c"], [(a,), (b,), (a + 0.01,)]) == [["a", "b"], ["c"]]
    assert identical_groups(["a", "b"], [(a,), (np.array([1.0, 3.0, 2.0]),)]) == [["a"], ["b"]]
    run_scenario(load_scenario(SCENARIOS / "field-rover-skid-turn.yaml"), csv=tmp_path / "f.csv")
    fig, (tr,) = plot_traces(tmp_path / "f.csv", tmp_path / "f.png")
    ax = fig.trundle_axes["spin"]
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert labels[:2] == ["left_front = left_middle = left_rear (identical)",
                          "right_front = right_middle = right_rear (identical)"]
    solid = [ln for ln in ax.lines if ln.get_linestyle() == "-"]
    assert len(solid) == 2
    np.testing.assert_array_equal(solid[1].get_ydata(), tr["right_front.spin"])
    # the ward cart's left and right wheels turn at different speeds on the arc: two entries
    run_scenario(load_scenario(SCENARIOS / "ward-cart-arc.yaml"), csv=tmp_path / "a.csv")
    fig, _ = plot_traces(tmp_path / "a.csv", tmp_path / "a.png")
    labels = [t.get_text() for t in fig.trundle_axes["spin"].get_legend().get_texts()]
    assert "left" in labels and "right" in labels and not any("identical" in x for x in labels)


def test_odometry_estimate_beside_the_truth_and_its_error(tmp_path, arc_trace):
    import pandas
    run_scenario(load_scenario(SCENARIOS / "ward-cart-odometry.yaml"), csv=tmp_path / "o.csv")
    fig = figure([read_trace(tmp_path / "o.csv")])
    ref = pandas.read_csv(tmp_path / "o.csv")                          # read independently with pandas
    est = next(ln for ln in fig.trundle_axes["path"].lines if ln.get_label() == "odometry estimate")
    np.testing.assert_array_equal(est.get_xdata(), ref["odom_x"].to_numpy())
    np.testing.assert_array_equal(est.get_ydata(), ref["odom_y"].to_numpy())
    pos = fig.trundle_axes["odometry"].lines[0]
    want = np.hypot(ref["odom_x"] - ref["x"], ref["odom_y"] - ref["y"]).to_numpy()
    np.testing.assert_allclose(pos.get_ydata(), want, rtol=1e-12)
    head = fig.trundle_axes["odometry_heading"].lines[0]
    d = np.angle(np.exp(1j * (ref["odom_theta"] - ref["theta"]).to_numpy()))     # wrapped by numpy
    np.testing.assert_allclose(head.get_ydata(), np.degrees(np.abs(d)), atol=1e-9)
    assert want[-1] > 0.01                                             # the estimate does drift here
    # a trace without odometry has no such panels
    fig = figure([read_trace(arc_trace[0])])
    assert fig.trundle_axes["odometry"] is None
    assert not [ln for ln in fig.trundle_axes["path"].lines if "odometry" in ln.get_label()]


def test_compare_names_each_trace_in_legends_and_slip_labels(tmp_path):
    a = _hand_cols()
    a["slip"] = np.linspace(0.0, 0.2, len(a["t"]))
    b = _hand_cols()
    b["slip"] = np.linspace(0.0, 0.1, len(b["t"]))
    pa, pb = _write_trace(tmp_path / "a.csv", a), _write_trace(tmp_path / "b.csv", b)
    fig = figure([read_trace(pa), read_trace(pb)])
    for name in ("velocity", "turn", "spin", "slip"):
        labels = [t.get_text() for t in fig.trundle_axes[name].get_legend().get_texts()]
        if name == "slip":
            assert labels == ["slip a.csv", "slip b.csv"]
        else:
            assert "solid: a.csv" in labels and "dotted: b.csv" in labels, name
    notes = sorted(t.get_text() for t in fig.trundle_axes["slip"].texts)
    assert notes == ["peak 0.1 m/s at 4 s (b.csv)", "peak 0.2 m/s at 4 s (a.csv)"]


def test_empty_panels_say_none(tmp_path):
    p = _write_trace(tmp_path / "h.csv", _hand_cols())                 # slip 0 throughout, no steering
    fig = figure([read_trace(p)])
    assert [t.get_text() for t in fig.trundle_axes["slip"].texts] == ["none: no wheel skids"]
    assert [t.get_text() for t in fig.trundle_axes["steer"].texts] == ["none: no wheel changes its angle"]
    assert not fig.trundle_axes["spin"].texts                         # the hand trace's wheel does spin


def test_legend_entries_start_end_and_commanded(tmp_path):
    from matplotlib.lines import Line2D

    p = _write_trace(tmp_path / "h.csv", _hand_cols())
    fig = figure([read_trace(p)])
    fig.canvas.draw()
    leg = fig.axes[0].get_legend()
    assert "start (circle), end (square)" in [t.get_text() for t in leg.get_texts()]
    markers = {ln.get_marker() for ln in leg.findobj(Line2D) if ln.get_color() == PATH}
    assert {"o", "s"} <= markers                                          # both markers drawn in the entry
    tleg = fig.trundle_axes["velocity"].get_legend()
    labels = [t.get_text() for t in tleg.get_texts()]
    assert "commanded (dashed)" in labels
    handle = tleg.legend_handles[labels.index("commanded (dashed)")]
    assert handle.get_linestyle() == "--"


def test_compare_labels_icr_per_file_and_counts_rows(tmp_path):
    a = _write_trace(tmp_path / "a.csv", _hand_cols(icr={3: (0.5, 0.5), 7: (400.0, 0.0)}))
    b = _write_trace(tmp_path / "b.csv", _hand_cols(icr={3: (0.6, 0.5), 7: (400.0, 0.0), 8: (0.0, -300.0)}))
    fig = figure([read_trace(a), read_trace(b)])
    labels = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert "ICR a.csv (1 row beyond the view)" in labels
    assert "ICR b.csv (2 rows beyond the view)" in labels
    single = [t.get_text() for t in figure([read_trace(a)]).axes[0].get_legend().get_texts()]
    assert "ICR (1 row beyond the view)" in single


def test_compare_of_another_robot_says_which_wheels_are_missing(cli, tmp_path):
    a = _write_trace(tmp_path / "a.csv", _hand_cols(wheels=("left", "right")))
    b = _write_trace(tmp_path / "b.csv", _hand_cols(wheels=("left", "drive", "ball")))
    code, out, err = cli(["plot", a, "--compare", b, "-o", tmp_path / "c.png"])
    assert code == 0, err
    notes = [ln for ln in out.splitlines() if ln.startswith("note")]
    assert len(notes) == 1 and "b.csv" in notes[0] and notes[0].endswith("drive, ball")
    texts = [t.get_text() for t in figure([read_trace(a), read_trace(b)]).texts]
    assert any("drive, ball" in t and "b.csv" in t for t in texts)
    # the same robot twice: no note
    code, out, _ = cli(["plot", a, "--compare", a, "-o", tmp_path / "d.png"])
    assert code == 0 and "note" not in out
    assert not [t for t in figure([read_trace(a), read_trace(a)]).texts if "not drawn" in t.get_text()]
