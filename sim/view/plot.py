"""Plots of traces: ``trundle plot TRACE.csv -o OUT.png [--compare OTHER.csv]``.

The one module that imports matplotlib (lazily, Agg backend, no pyplot
state).  :func:`read_trace` reads a trace CSV robustly (blank cells are
NaN; anything else that is not a number is an :class:`~sim.errors.InputError`
with file and line) and keeps memory flat: long traces are thinned to at most
``max_rows`` evenly spaced rows while the slip peak is taken from every row.

The figure (:func:`figure`): the x-y path with heading ticks, start and end
marks and the ICR points; the body twist against time (commanded dashed, the
m/s and rad/s axes sharing their zero line); per-wheel spin and steer, command
(dashed) against actual; total slip against time with its peak marked.  A
second trace is overlaid in dotted lines; its wheels are drawn only where the
first trace has a wheel of the same name (:func:`unshown_wheels` lists the rest).
Legends sit in a strip along the top of each panel, above the data.
"""
from __future__ import annotations

import math
import os
from dataclasses import dataclass, field

import numpy as np

from sim.errors import InputError

REQUIRED = ("t", "x", "y", "theta")
# Okabe-Ito colours (as in sim.render), cycled for wheels
COLOURS = ("#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#F0E442", "#000000")
PATH, COMPARE, ICR, PEAK = "#0072B2", "#E69F00", "#CC79A7", "#D55E00"


@dataclass
class Trace:
    """A trace read from CSV.

    data : column name -> ndarray (m,) float (NaN for blank cells), the kept rows.
    wheels : wheel names in file order.  rows : rows in the file.
    stride : every ``stride``-th row was kept (plus the last).
    peak_slip, peak_t : m/s and s, over every row.
    """

    path: str
    columns: list
    data: dict
    wheels: list
    rows: int
    stride: int = 1
    peak_slip: float = math.nan
    peak_t: float = math.nan
    label: str = field(default="")

    def __getitem__(self, name):
        return self.data[name]

    def has(self, name) -> bool:
        return name in self.data and bool(np.any(np.isfinite(self.data[name])))


def read_trace(path, max_rows: int = 20000) -> Trace:
    """Read a trace CSV (see README "Traces").  Raises :class:`InputError`.

    Lines are read and checked by :class:`sim.tracecsv.TraceFile` (the reader
    ``trundle diff`` uses), a block at a time.
    """
    from sim.traces.csvread import CHUNK_BYTES, TraceFile, floats

    src = os.fspath(path)
    tf = TraceFile(src, CHUNK_BYTES)
    try:
        header = list(tf.columns)
        missing = [c for c in REQUIRED if c not in header]
        if missing:
            raise InputError(src, 1, f"not a trace: missing column(s) {', '.join(missing)}")
        nc = len(header)
        ti = header.index("t")
        si = header.index("slip") if "slip" in header else None
        kept, stride, last = [], 1, None
        peak, peak_t = -math.inf, math.nan
        i = 0
        for first, lines, _ in tf.blocks():
            if not lines:
                continue
            cells = b",".join(lines).split(b",")
            where = lambda j: (src, first + j // nc, header[j % nc])
            block = floats(cells, where).reshape(len(lines), nc)
            bad = np.argwhere(np.isinf(block))
            if len(bad):
                r, c = bad[0]
                raise InputError(src, first + int(r), f"column '{header[c]}': expected a finite number")
            blank = np.flatnonzero(np.isnan(block[:, ti]))
            if len(blank):
                raise InputError(src, first + int(blank[0]), "column 't' is blank")
            if si is not None and np.any(np.isfinite(block[:, si])):
                j = int(np.nanargmax(block[:, si]))
                if block[j, si] > peak:
                    peak, peak_t = float(block[j, si]), float(block[j, ti])
            k = i + np.arange(len(block))
            kept.append(block[k % stride == 0])
            last = block[-1]
            i += len(block)
            if sum(len(b) for b in kept) > 2 * max_rows:
                allk = np.vstack(kept)
                while len(allk) > 2 * max_rows:     # keep rows k = 0, s, 2s, ... with s doubled
                    allk, stride = allk[::2], stride * 2
                kept = [allk]
    finally:
        tf.close()
    if i == 0:
        raise InputError(src, 2, "the trace has no rows")
    arr = np.vstack(kept)
    if (i - 1) % stride:
        arr = np.vstack([arr, last])                # the last row is always kept
    data = {c: arr[:, j] for j, c in enumerate(header)}
    wheels = []
    for c in header:
        name, dot, part = c.rpartition(".")
        if dot and part == "spin" and name not in wheels:
            wheels.append(name)
    return Trace(src, header, data, wheels, i, stride, peak if si is not None and peak > -math.inf else math.nan,
                 peak_t, os.path.basename(src))


def _heading_ticks(ax, tr, colour, n=24):
    x, y, th = tr["x"], tr["y"], tr["theta"]
    ok = np.isfinite(x) & np.isfinite(y) & np.isfinite(th)
    if not np.any(ok):
        return
    x, y, th = x[ok], y[ok], th[ok]
    span = max(np.ptp(x), np.ptp(y), 0.1)
    idx = np.unique(np.linspace(0, len(x) - 1, n).round().astype(int))
    L = 0.04 * span
    ax.quiver(x[idx], y[idx], np.cos(th[idx]) * L, np.sin(th[idx]) * L, angles="xy", scale_units="xy",
              scale=1, color=colour, width=0.004, headwidth=3.5, headlength=4, zorder=3)


def unshown_wheels(traces) -> list:
    """Wheels of the second trace that the figure does not draw (its wheel panels follow the first)."""
    if len(traces) < 2:
        return []
    return [w for w in traces[1].wheels if w not in traces[0].wheels]


def zero_aligned_limits(spans, floor: float = 0.05, margin: float = 0.05) -> list:
    """y limits, one per axis, that put y = 0 at the same height on every axis (twin axes).

    spans : list of (lo, hi), each axis' data range with lo <= 0 <= hi, in that axis' units.
    floor : every axis spans at least ``2 floor`` (a still twist does not blow rounding noise
    up to full height).  margin : fraction of the span added below and above.
    Returns a list of (ymin, ymax).
    """
    fb = fa = 0.0
    for lo, hi in spans:
        s = max(hi - lo, 2 * floor)
        fb, fa = max(fb, -lo / s), max(fa, hi / s)
    p = fb / (fb + fa) if fb + fa > 1e-9 else 0.5         # fraction of the height below zero
    out = []
    for lo, hi in spans:
        h = max(-lo / p if p > 0 else 0.0, hi / (1 - p) if p < 1 else 0.0, 2 * floor)
        out.append((-p * h - margin * h, (1 - p) * h + margin * h))
    return out


def _span(arrays):
    """(lo, hi) of the finite values in ``arrays``, widened to include 0."""
    vals = [a[np.isfinite(a)] for a in arrays]
    vals = [v for v in vals if v.size]
    if not vals:
        return 0.0, 0.0
    return min(0.0, min(float(v.min()) for v in vals)), max(0.0, max(float(v.max()) for v in vals))


def _legend_on_top(ax, handles, labels, ncol, twins=(), **kw):
    """A legend along the top of ``ax``, the y limits of ``ax`` (and ``twins``) raised so no data is under it."""
    from matplotlib.legend_handler import HandlerTuple

    r = ax.figure.canvas.get_renderer()
    box = ax.get_window_extent(r)
    while True:
        ncol = max(1, math.ceil(len(labels) / math.ceil(len(labels) / ncol)))     # rows evenly filled
        leg = ax.legend(handles, labels, loc="upper center", fontsize=8, ncol=ncol, framealpha=0.9,
                        handlelength=1.8, columnspacing=1.2, handler_map={tuple: HandlerTuple(ndivide=None)}, **kw)
        lb = leg.get_window_extent(r)
        if lb.width <= box.width - 8 or ncol == 1:
            break
        ncol -= 1
    f = min((lb.height + 8) / box.height, 0.6)             # fraction of the axes the legend needs
    for a in (ax,) + tuple(twins):
        lo, hi = a.get_ylim()
        a.set_ylim(lo, lo + (hi - lo) / (1 - f))
    return leg


def _fit_path_view(ax, lim, top_px):
    """Equal-scale limits showing the box ``lim`` (x0, x1, y0, y1) m below a strip ``top_px`` px high."""
    r = ax.figure.canvas.get_renderer()
    box = ax.get_window_extent(r)
    x0, x1, y0, y1 = lim
    room = max(box.height - top_px, 0.4 * box.height)                  # px left for the data
    s = min(box.width / (x1 - x0), room / (y1 - y0))                      # px per m
    cx = 0.5 * (x0 + x1)
    ax.set_xlim(cx - 0.5 * box.width / s, cx + 0.5 * box.width / s)
    ylo = y0 - 0.5 * (room / s - (y1 - y0))
    ax.set_ylim(ylo, ylo + box.height / s)


def figure(traces):
    """A matplotlib Figure of one or two :class:`Trace` objects (the second overlaid).

    Legends sit along the top of their panels with the data kept below them; the
    twist panel's m/s and rad/s axes share their zero line.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D

    fig = Figure(figsize=(13, 10), dpi=100)
    FigureCanvasAgg(fig)
    dropped = unshown_wheels(traces)
    gs = fig.add_gridspec(3, 2, width_ratios=(1.05, 1.0), hspace=0.38, wspace=0.22,
                          left=0.06, right=0.94, top=0.915 if dropped else 0.93, bottom=0.06)
    ax_path = fig.add_subplot(gs[0:2, 0])
    ax_slip = fig.add_subplot(gs[2, 0])
    ax_tw = fig.add_subplot(gs[0, 1])
    ax_spin = fig.add_subplot(gs[1, 1], sharex=ax_tw)
    ax_steer = fig.add_subplot(gs[2, 1], sharex=ax_tw)
    main = traces[0]
    title = main.label if len(traces) == 1 else f"{main.label}  (solid)  vs  {traces[1].label}  (dotted)"
    fig.suptitle(title, fontsize=13, y=0.985)
    if dropped:
        fig.text(0.5, 0.953, f"note: wheels of {traces[1].label} not drawn: {', '.join(dropped)} "
                 f"(the wheel panels show the wheels of {main.label})", ha="center", va="center",
                 fontsize=9, color=PEAK)
    styles = ("-", ":")
    grey = "#666666"
    # path
    box = []
    for j, tr in enumerate(traces):
        col = PATH if j == 0 else COMPARE
        ax_path.plot(tr["x"], tr["y"], styles[j], color=col, lw=2, label=f"path {tr.label}", zorder=2)
        _heading_ticks(ax_path, tr, col)
        start = ax_path.plot(tr["x"][0], tr["y"][0], "o", color=col, ms=7, zorder=4)[0]
        end = ax_path.plot(tr["x"][-1], tr["y"][-1], "s", color=col, ms=8, zorder=4)[0]
        if j == 0:
            start_end = (start, end)
        box.append((np.nanmin(tr["x"]), np.nanmax(tr["x"]), np.nanmin(tr["y"]), np.nanmax(tr["y"])))
    b = np.array(box)
    x0, x1, y0, y1 = b[:, 0].min(), b[:, 1].max(), b[:, 2].min(), b[:, 3].max()
    pad = 0.12 * max(x1 - x0, y1 - y0, 0.5)
    lim = (x0 - pad, x1 + pad, y0 - pad, y1 + pad)
    for j, tr in enumerate(traces):
        if tr.has("icr_x"):
            ix, iy = tr["icr_x"], tr["icr_y"]
            ok = np.isfinite(ix) & np.isfinite(iy)
            inside = ok & (ix >= lim[0]) & (ix <= lim[1]) & (iy >= lim[2]) & (iy <= lim[3])
            step = max(1, int(np.sum(inside)) // 400)
            sel = np.flatnonzero(inside)[::step]
            out = int(np.sum(ok & ~inside))
            lab = "ICR" + (f" {tr.label}" if len(traces) > 1 else "")
            lab += f" ({out} row{'' if out == 1 else 's'} beyond the view)" if out else ""
            ax_path.plot(ix[sel], iy[sel], "x" if j == 0 else "+", color=ICR, ms=5, lw=0, label=lab, zorder=1)
    ax_path.set_xlabel("x (m, world)")
    ax_path.set_ylabel("y (m, world)")
    ax_path.set_title("path, heading ticks, ICR")
    ax_path.grid(True, color="#dddddd")
    hs, ls = ax_path.get_legend_handles_labels()
    hs.insert(1, start_end)
    ls.insert(1, "start (circle), end (square)")
    leg = _legend_on_top(ax_path, hs, ls, 2)
    _fit_path_view(ax_path, lim, leg.get_window_extent(fig.canvas.get_renderer()).height + 8)
    ax_path.set_aspect("equal", adjustable="datalim")
    # twist
    ax_w = ax_tw.twinx()
    drawn = {ax_tw: [], ax_w: []}
    commanded = False
    for j, tr in enumerate(traces):
        t = tr["t"]
        for name, col, ax in (("vx", COLOURS[0], ax_tw), ("vy", COLOURS[1], ax_tw), ("omega", COLOURS[2], ax_w)):
            unit = "rad/s" if name == "omega" else "m/s"
            ax.plot(t, tr[name], styles[j], color=col, lw=1.6, label=f"{name} ({unit})" if j == 0 else None)
            drawn[ax].append(tr[name])
            if j == 0 and tr.has("cmd_" + name):
                ax.plot(t, tr["cmd_" + name], "--", color=col, lw=1.0, alpha=0.8)
                drawn[ax].append(tr["cmd_" + name])
                commanded = True
    for ax, yl in zip((ax_tw, ax_w), zero_aligned_limits([_span(drawn[ax_tw]), _span(drawn[ax_w])])):
        ax.set_ylim(*yl)
    ax_tw.set_ylabel("vx, vy (m/s)")
    ax_w.set_ylabel("omega (rad/s)")
    ax_tw.set_title("body twist (commanded dashed)")
    ax_tw.grid(True, color="#dddddd")
    ax_w.axhline(0.0, color="#aaaaaa", lw=0.8, zorder=0)
    h1, l1 = ax_tw.get_legend_handles_labels()
    h2, l2 = ax_w.get_legend_handles_labels()
    if commanded:
        h2, l2 = h2 + [Line2D([], [], ls="--", color=grey, lw=1.0)], l2 + ["commanded (dashed)"]
    _legend_on_top(ax_tw, h1 + h2, l1 + l2, 4, twins=(ax_w,))
    # wheels
    steered_any = False
    spin_cmd = steer_cmd = False
    for j, tr in enumerate(traces):
        t = tr["t"]
        for i, w in enumerate(main.wheels):
            col = COLOURS[i % len(COLOURS)]
            if f"{w}.spin" in tr.data:
                ax_spin.plot(t, tr[f"{w}.spin"], styles[j], color=col, lw=1.4, label=w if j == 0 else None)
                if j == 0 and tr.has(f"{w}.spin_cmd"):
                    ax_spin.plot(t, tr[f"{w}.spin_cmd"], "--", color=col, lw=0.9, alpha=0.8)
                    spin_cmd = True
            st = tr.data.get(f"{w}.steer")
            if st is not None and np.nanmax(st) - np.nanmin(st) > 1e-9:
                steered_any = True
                ax_steer.plot(t, np.degrees(st), styles[j], color=col, lw=1.4, label=w if j == 0 else None)
                sc = tr.data.get(f"{w}.steer_cmd")
                if j == 0 and sc is not None and np.any(np.isfinite(sc)):
                    ax_steer.plot(t, np.degrees(sc), "--", color=col, lw=0.9, alpha=0.8)
                    steer_cmd = True
    ax_spin.set_ylabel("spin (rad/s)")
    ax_spin.set_title("wheel spin (command dashed)")
    ax_spin.grid(True, color="#dddddd")
    ax_steer.set_ylabel("steer (deg, body frame)")
    ax_steer.set_xlabel("t (s)")
    ax_steer.set_title("wheel steer (command dashed)")
    ax_steer.grid(True, color="#dddddd")
    for ax, cmd, show in ((ax_spin, spin_cmd, bool(main.wheels)), (ax_steer, steer_cmd, steered_any)):
        if show:
            hs, ls = ax.get_legend_handles_labels()
            if cmd:
                hs, ls = hs + [Line2D([], [], ls="--", color=grey, lw=0.9)], ls + ["command (dashed)"]
            _legend_on_top(ax, hs, ls, 4)
    if not steered_any:
        ax_steer.text(0.5, 0.5, "no wheel changes its angle", transform=ax_steer.transAxes,
                      ha="center", va="center", color="#666666")
    # slip
    for j, tr in enumerate(traces):
        if "slip" not in tr.data:
            continue
        col = PATH if j == 0 else COMPARE
        ax_slip.plot(tr["t"], tr["slip"], styles[j], color=col, lw=1.6, label=f"slip {tr.label}")
        if math.isfinite(tr.peak_slip):
            ax_slip.plot([tr.peak_t], [tr.peak_slip], "v", color=PEAK, ms=9, zorder=4)
            ax_slip.annotate(f"peak {tr.peak_slip:.3g} m/s at {tr.peak_t:g} s", (tr.peak_t, tr.peak_slip),
                             textcoords="offset points", xytext=(8, 4 + 12 * j), fontsize=9, color=PEAK)
    ax_slip.set_xlabel("t (s)")
    ax_slip.set_ylabel("slip (m/s, all wheels)")
    ax_slip.set_title("slip (peak marked)")
    ax_slip.grid(True, color="#dddddd")
    top = max((tr.peak_slip for tr in traces if math.isfinite(tr.peak_slip)), default=0.0)
    top = max(top, 1e-3)
    ax_slip.set_ylim(-0.05 * top, 1.3 * top)
    return fig


def plot_traces(path, out, compare=None, max_rows: int = 20000):
    """Read ``path`` (and ``compare``), write the figure as PNG to ``out`` (through ``.part``)."""
    traces = [read_trace(path, max_rows)]
    if compare:
        traces.append(read_trace(compare, max_rows))
    d = os.path.dirname(os.path.abspath(out))
    if not os.path.isdir(d):
        raise InputError("-o", None, f"directory '{os.path.dirname(out) or '.'}' does not exist")
    fig = figure(traces)
    part = os.fspath(out) + ".part"
    try:
        with open(part, "wb") as fh:
            fig.savefig(fh, format="png", metadata={"Software": None})
        os.replace(part, out)
    except BaseException:
        if os.path.exists(part):
            os.remove(part)
        raise
    return fig, traces


def plot_square_test(path, before, after=None, title: str = "") -> bool:
    """Scatter of the return errors (mm) before/after correction as a PNG.

    Returns False (and writes nothing) when matplotlib is not installed.
    ``before``/``after`` are :class:`sim.calibrate.SquareRuns`.
    """
    try:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure
    except ImportError:
        return False
    fig = Figure(figsize=(6.0, 6.0), dpi=100)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    # Okabe-Ito (README "Colours and symbols"): cw blue, ccw vermillion; after in their pale partners
    # (sky blue, orange) and hollow; every cloud its own marker shape
    sets = [("before", before, (("#0072B2", "o"), ("#D55E00", "s")), True)]
    if after is not None:
        sets.append(("after", after, (("#56B4E9", "^"), ("#E69F00", "D")), False))
    for label, runs, styles, filled in sets:
        for d, pts, (col, mark) in (("cw", runs.cw, styles[0]), ("ccw", runs.ccw, styles[1])):
            ax.scatter(pts[:, 0] * 1e3, pts[:, 1] * 1e3, marker=mark, s=44, linewidths=1.4, zorder=3,
                       facecolors=col if filled else "white", edgecolors=col, label=f"{d} {label}: runs")
            cg = pts.mean(axis=0) * 1e3
            ax.plot([cg[0]], [cg[1]], "+", color="white", ms=17, mew=5.0, zorder=4)     # halo
            ax.plot([cg[0]], [cg[1]], "+", color=col, ms=16, mew=2.2, zorder=5,
                    label=f"{d} {label}: centre of gravity")
    ax.axhline(0.0, color="0.7", lw=0.8)
    ax.axvline(0.0, color="0.7", lw=0.8)
    ax.set_xlabel("return error x (mm), along the first leg")
    ax.set_ylabel("return error y (mm), to the left")
    ax.set_aspect("equal", adjustable="datalim")
    ax.legend(loc="best", fontsize=8)
    ax.set_title(title or f"square test, side {before.side:g} m (+ centre of gravity)", fontsize=10)
    path = os.fspath(path)
    part = path + ".part"
    try:
        fig.savefig(part, format="png")
        os.replace(part, path)
    except BaseException:
        if os.path.exists(part):
            os.remove(part)
        raise
    return True
