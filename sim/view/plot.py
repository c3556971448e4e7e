"""Plots of traces: ``trundle plot TRACE -o OUT.png [--compare OTHER]``.

The one module that imports matplotlib (lazily, Agg backend, no pyplot
state).  :func:`read_trace` reads a trace (CSV or Parquet) robustly (blank cells are
NaN; anything else that is not a number is an :class:`~sim.errors.InputError`
with file and line) and keeps memory flat: long traces are thinned to at most
``max_rows`` evenly spaced rows while the slip peak is taken from every row.

The figure (:func:`figure`): the x-y path with heading ticks, start and end
marks, the ICR points and (traces with odometry) the estimate beside the truth,
with its error against time; the body velocity and turn rate in panels of
their own (commanded dashed); per-wheel spin and steer, command (dashed)
against actual, identical curves drawn once and named together; total slip
against time with its peak marked; an empty panel says "none".  A second trace
is overlaid in dotted lines and named in the legends and slip labels; its
wheels are drawn only where the first trace has a wheel of the same name
(:func:`unshown_wheels` lists the rest).  Legends sit in a strip along the top
of each panel, above the data.

With a floor and the base's footprint (``trundle plot --floor F --robot R``),
the path panel also shows the floor's features, the area the first trace's
base swept (translucent) and the closest pair of points between base and
floor with the distance; a first contact is marked in vermillion.  The
clearance is measured on every row (:class:`sim.runs.clearance.ClearanceMeter`,
fed block by block while the trace is read), not on the thinned rows.
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
ODOM = "#009E73"                                                  # bluish green: the odometry estimate
TWIST_COLOURS = {"vx": "#0072B2", "vy": "#E69F00", "omega": "#009E73"}
ODOMETRY = ("odom_x", "odom_y", "odom_theta")


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
    clearance: object = None

    def __getitem__(self, name):
        return self.data[name]

    def has(self, name) -> bool:
        return name in self.data and bool(np.any(np.isfinite(self.data[name])))


def read_trace(path, max_rows: int = 20000, on_block=None) -> Trace:
    """Read a trace, CSV or Parquet (see README "Traces").  Raises :class:`InputError`.

    Pages of rows come from :class:`sim.traces.read.TraceReader` (the reader
    ``trundle diff`` uses), one at a time.  ``on_block(header, block, page)``,
    if given, sees every block of rows (array (m, columns)) before thinning;
    ``page.error(i, message)`` locates a problem in row i of it.
    """
    from sim.traces.read import TraceReader

    src = os.fspath(path)
    with TraceReader(src) as rd:
        header = list(rd.columns)
        missing = [c for c in REQUIRED if c not in header]
        if missing:
            raise InputError(src, 1 if rd.kind == "csv" else None,
                             f"not a trace: missing column(s) {', '.join(missing)}")
        ti = header.index("t")
        si = header.index("slip") if "slip" in header else None
        kept, stride, last = [], 1, None
        peak, peak_t = -math.inf, math.nan
        i = 0
        for page in rd.pages():
            block = page.values()
            bad = np.argwhere(np.isinf(block))
            if len(bad):
                r, c = bad[0]
                raise page.error(int(r), f"column '{header[c]}': expected a finite number")
            blank = np.flatnonzero(np.isnan(block[:, ti]))
            if len(blank):
                raise page.error(int(blank[0]), "column 't' is blank")
            if on_block is not None:
                on_block(header, block, page)
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
    if i == 0:
        raise InputError(src, 2 if rd.kind == "csv" else None, "the trace has no rows")
    arr = np.vstack(kept)
    if (i - 1) % stride:
        arr = np.vstack([arr, last])                # the last row is always kept
    data = {c: np.ascontiguousarray(arr[:, j]) for j, c in enumerate(header)}
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


def identical_groups(names, arrays, rel: float = 1e-9) -> list:
    """Group ``names`` whose curves are the same (each curve a tuple of arrays; NaN equals NaN).

    Two curves are the same when every value agrees within ``rel`` times the largest
    magnitude of either (at least 1e-12).  Returns lists of names in order of first
    appearance; drawn as one line with one legend entry, identical curves stay
    distinguishable instead of hiding each other.
    """
    groups = []
    for name, arr in zip(names, arrays):
        for g in groups:
            ref = g[1]
            if len(ref) == len(arr) and all(_same(a, b, rel) for a, b in zip(ref, arr)):
                g[0].append(name)
                break
        else:
            groups.append(([name], arr))
    return [g[0] for g in groups]


def _same(a, b, rel):
    a, b = np.asarray(a, float), np.asarray(b, float)
    if a.shape != b.shape or not np.array_equal(np.isnan(a), np.isnan(b)):
        return False
    ok = np.isfinite(a)
    if not np.any(ok):
        return True
    tol = max(rel * max(float(np.max(np.abs(a[ok]))), float(np.max(np.abs(b[ok])))), 1e-12)
    return bool(np.all(np.abs(a[ok] - b[ok]) <= tol))


def _group_label(names) -> str:
    return names[0] if len(names) == 1 else " = ".join(names) + " (identical)"


def _span(arrays):
    """(lo, hi) of the finite values in ``arrays``, widened to include 0."""
    vals = [a[np.isfinite(a)] for a in arrays]
    vals = [v for v in vals if v.size]
    if not vals:
        return 0.0, 0.0
    return min(0.0, min(float(v.min()) for v in vals)), max(0.0, max(float(v.max()) for v in vals))


def _zero_limits(ax, arrays, floor):
    """y limits showing ``arrays`` and 0, at least ``2 floor`` high (a still signal is not blown up)."""
    lo, hi = _span(arrays)
    if hi - lo < 2 * floor:
        mid = 0.5 * (lo + hi)
        lo, hi = min(lo, mid - floor), max(hi, mid + floor)
    pad = 0.06 * (hi - lo)
    ax.set_ylim(lo - pad, hi + pad)


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


def _trace_keys(traces, styles):
    """Legend handles naming each trace by its line style (only when comparing)."""
    from matplotlib.lines import Line2D
    if len(traces) < 2:
        return [], []
    return ([Line2D([], [], ls=st, color="#444444", lw=1.6) for st in styles[:len(traces)]],
            [f"{'solid' if st == '-' else 'dotted'}: {tr.label}" for st, tr in zip(styles, traces)])


def _none(ax, text):
    """An empty panel says so."""
    ax.text(0.5, 0.5, text, transform=ax.transAxes, ha="center", va="center", color="#666666", fontsize=10)


def figure(traces, floor=None, clearance=None):
    """A matplotlib Figure of one or two :class:`Trace` objects (the second overlaid, dotted).

    Panels (``fig.trundle_axes`` names them): ``path`` (x-y path, heading ticks, start and end,
    ICR points, and the odometry estimate when the trace has one), ``slip``, ``odometry``
    (position and heading error of the estimate, when there is one), ``velocity`` (vx, vy),
    ``turn`` (omega), ``spin`` and ``steer`` (per wheel, command dashed).  Each unit has its
    own panel, so no two curves of different units can land on each other; wheels (and vx,
    vy) with identical curves are drawn once with one legend entry naming them all.  Legends
    sit along the top of their panels with the data kept below them.  ``floor`` (a
    :class:`~sim.model.floor.Floor`) and ``clearance`` (a :class:`~sim.runs.clearance.Clearance`
    of the first trace) add the floor, the swept area and the closest pair to the path panel.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D

    fig = Figure(figsize=(13, 11), dpi=100)
    FigureCanvasAgg(fig)
    dropped = unshown_wheels(traces)
    main = traces[0]
    odo = [j for j, tr in enumerate(traces) if all(tr.has(c) for c in ODOMETRY)]
    gs = fig.add_gridspec(4, 2, width_ratios=(1.05, 1.0), hspace=0.42, wspace=0.22,
                          left=0.06, right=0.94, top=0.92 if dropped else 0.935, bottom=0.05)
    ax_path = fig.add_subplot(gs[0:2, 0] if odo else gs[0:3, 0])
    ax_slip = fig.add_subplot(gs[3, 0])
    ax_odo = ax_odh = None
    if odo:
        sub = gs[2, 0].subgridspec(1, 2, wspace=0.3)
        ax_odo = fig.add_subplot(sub[0, 0])
        ax_odh = fig.add_subplot(sub[0, 1], sharex=ax_odo)
    ax_v = fig.add_subplot(gs[0, 1])
    ax_w = fig.add_subplot(gs[1, 1], sharex=ax_v)
    ax_spin = fig.add_subplot(gs[2, 1], sharex=ax_v)
    ax_steer = fig.add_subplot(gs[3, 1], sharex=ax_v)
    fig.trundle_axes = {"path": ax_path, "slip": ax_slip, "odometry": ax_odo, "odometry_heading": ax_odh,
                        "velocity": ax_v, "turn": ax_w, "spin": ax_spin, "steer": ax_steer}
    title = main.label if len(traces) == 1 else f"{main.label}  (solid)  vs  {traces[1].label}  (dotted)"
    fig.suptitle(title, fontsize=13, y=0.985)
    if dropped:
        fig.text(0.5, 0.952, f"note: wheels of {traces[1].label} not drawn: {', '.join(dropped)} "
                 f"(the wheel panels show the wheels of {main.label})", ha="center", va="center",
                 fontsize=9, color=PEAK)
    styles = ("-", ":")
    grey = "#666666"
    keys_h, keys_l = _trace_keys(traces, styles)
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
        if j in odo:
            ax_path.plot(tr["odom_x"], tr["odom_y"], "--" if j == 0 else (0, (1, 3)), color=ODOM, lw=1.6,
                         label=f"odometry estimate{' ' + tr.label if len(traces) > 1 else ''}", zorder=2.5)
            box.append((np.nanmin(tr["odom_x"]), np.nanmax(tr["odom_x"]),
                        np.nanmin(tr["odom_y"]), np.nanmax(tr["odom_y"])))
    if floor is not None:
        box.append(_draw_floor(ax_path, floor, clearance, box))
    b = np.array(box)
    x0, x1, y0, y1 = b[:, 0].min(), b[:, 1].max(), b[:, 2].min(), b[:, 3].max()
    pad = 0.12 * max(x1 - x0, y1 - y0, 0.5)
    if floor is not None:
        pad = min(pad, 0.3)                 # the floor's features already frame the path
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
    ax_path.set_title("path, heading ticks, ICR" + (", odometry estimate (dashed)" if odo else ""))
    ax_path.grid(True, color="#dddddd")
    hs, ls = ax_path.get_legend_handles_labels()
    hs.insert(1, start_end)
    ls.insert(1, "start (circle), end (square)")
    leg = _legend_on_top(ax_path, hs, ls, 2)
    _fit_path_view(ax_path, lim, leg.get_window_extent(fig.canvas.get_renderer()).height + 8)
    ax_path.set_aspect("equal", adjustable="datalim")
    # odometry error
    if odo:
        for j, tr in enumerate(traces):
            if j not in odo:
                continue
            t = tr["t"]
            pos = np.hypot(tr["odom_x"] - tr["x"], tr["odom_y"] - tr["y"])
            head = np.degrees(np.abs((tr["odom_theta"] - tr["theta"] + np.pi) % (2 * np.pi) - np.pi))
            ax_odo.plot(t, pos, styles[j], color=ODOM, lw=1.5, label=f"position error{' ' + tr.label if j else ''}")
            ax_odh.plot(t, head, styles[j], color=ODOM, lw=1.5, label=f"heading error{' ' + tr.label if j else ''}")
        for ax, unit, name in ((ax_odo, "m", "position"), (ax_odh, "deg", "heading")):
            ax.set_title(f"odometry {name} error", fontsize=10)
            ax.set_ylabel(f"|estimate - truth| ({unit})", fontsize=8)
            ax.set_xlabel("t (s)")
            ax.grid(True, color="#dddddd")
            _zero_limits(ax, [ln.get_ydata() for ln in ax.lines], 1e-6)
            ax.set_ylim(bottom=0.0)
    # twist: m/s and rad/s in panels of their own (vx and omega never share an axis)
    commanded = {ax_v: False, ax_w: False}
    for ax, names, unit in ((ax_v, ("vx", "vy"), "m/s"), (ax_w, ("omega",), "rad/s")):
        arrays = [(main[n], main.data.get("cmd_" + n, np.full(len(main["t"]), np.nan))) for n in names]
        groups = identical_groups(names, arrays)
        drawn = []
        for j, tr in enumerate(traces):
            t = tr["t"]
            for g in groups:
                col = TWIST_COLOURS[g[0]]
                for n in (g[:1] if j == 0 else g):
                    ax.plot(t, tr[n], styles[j], color=col, lw=1.6,
                            label=f"{_group_label(g)} ({unit})" if j == 0 else None)
                    drawn.append(tr[n])
                    if j == 0 and tr.has("cmd_" + n):
                        ax.plot(t, tr["cmd_" + n], "--", color=col, lw=1.0, alpha=0.8)
                        drawn.append(tr["cmd_" + n])
                        commanded[ax] = True
        _zero_limits(ax, drawn, 0.05)
        ax.axhline(0.0, color="#aaaaaa", lw=0.8, zorder=0)
        ax.grid(True, color="#dddddd")
    ax_v.set_ylabel("vx, vy (m/s)")
    ax_v.set_title("body velocity (commanded dashed)")
    ax_w.set_ylabel("omega (rad/s)")
    ax_w.set_title("body turn rate (commanded dashed)")
    for ax in (ax_v, ax_w):
        hs, ls = ax.get_legend_handles_labels()
        if commanded[ax]:
            hs, ls = hs + [Line2D([], [], ls="--", color=grey, lw=1.0)], ls + ["commanded (dashed)"]
        _legend_on_top(ax, hs + keys_h, ls + keys_l, 4)
    # wheels: identical curves grouped (e.g. the three wheels of one side of a skid-steer base)
    nan = np.full(len(main["t"]), np.nan)
    spin_names = [w for w in main.wheels if f"{w}.spin" in main.data]
    spin_groups = identical_groups(spin_names, [(main[f"{w}.spin"], main.data.get(f"{w}.spin_cmd", nan))
                                                for w in spin_names])
    steer_names = [w for w in main.wheels if f"{w}.steer" in main.data
                   and np.nanmax(main[f"{w}.steer"]) - np.nanmin(main[f"{w}.steer"]) > 1e-9]
    steer_groups = identical_groups(steer_names, [(main[f"{w}.steer"], main.data.get(f"{w}.steer_cmd", nan))
                                                  for w in steer_names])
    colour_of = {w: COLOURS[i % len(COLOURS)] for i, w in enumerate(main.wheels)}
    flags = {ax_spin: False, ax_steer: False}
    for ax, groups, part, conv in ((ax_spin, spin_groups, "spin", lambda v: v),
                                   (ax_steer, steer_groups, "steer", np.degrees)):
        for j, tr in enumerate(traces):
            t = tr["t"]
            for g in groups:
                col = colour_of[g[0]]
                for w in (g[:1] if j == 0 else g):
                    if f"{w}.{part}" not in tr.data:
                        continue
                    ax.plot(t, conv(tr[f"{w}.{part}"]), styles[j], color=col, lw=1.4,
                            label=_group_label(g) if j == 0 else None)
                    cmd = tr.data.get(f"{w}.{part}_cmd")
                    if j == 0 and cmd is not None and np.any(np.isfinite(cmd)):
                        ax.plot(t, conv(cmd), "--", color=col, lw=0.9, alpha=0.8)
                        flags[ax] = True
    ax_spin.set_ylabel("spin (rad/s)")
    ax_spin.set_title("wheel spin (command dashed)")
    ax_steer.set_ylabel("steer (deg, body frame)")
    ax_steer.set_xlabel("t (s)")
    ax_steer.set_title("wheel steer (command dashed)")
    for ax, groups, empty in ((ax_spin, spin_groups, "none: no wheel spins"),
                              (ax_steer, steer_groups, "none: no wheel changes its angle")):
        ax.grid(True, color="#dddddd")
        if groups:
            hs, ls = ax.get_legend_handles_labels()
            if flags[ax]:
                hs, ls = hs + [Line2D([], [], ls="--", color=grey, lw=0.9)], ls + ["command (dashed)"]
            _legend_on_top(ax, hs + keys_h, ls + keys_l, 4)
        else:
            _none(ax, empty)
    # slip
    any_slip = False
    for j, tr in enumerate(traces):
        if "slip" not in tr.data:
            continue
        col = PATH if j == 0 else COMPARE
        ax_slip.plot(tr["t"], tr["slip"], styles[j], color=col, lw=1.6, label=f"slip {tr.label}")
        if math.isfinite(tr.peak_slip) and tr.peak_slip > 0:
            any_slip = True
            name = f" ({tr.label})" if len(traces) > 1 else ""
            ax_slip.plot([tr.peak_t], [tr.peak_slip], "v", color=PEAK, ms=9, zorder=4)
            ax_slip.annotate(f"peak {tr.peak_slip:.3g} m/s at {tr.peak_t:g} s{name}", (tr.peak_t, tr.peak_slip),
                             textcoords="offset points", xytext=(8, 4 + 12 * j), fontsize=9, color=PEAK)
    ax_slip.set_xlabel("t (s)")
    ax_slip.set_ylabel("slip (m/s, all wheels)")
    ax_slip.set_title("slip (peak marked)")
    ax_slip.grid(True, color="#dddddd")
    top = max((tr.peak_slip for tr in traces if math.isfinite(tr.peak_slip)), default=0.0)
    top = max(top, 1e-3)
    ax_slip.set_ylim(-0.05 * top, 1.3 * top)
    if not any_slip:
        _none(ax_slip, "none: no wheel skids" if any("slip" in tr.data for tr in traces) else "none: no slip column")
        ax_slip.set_yticks([0.0])
    if len(traces) > 1 and ax_slip.lines:
        _legend_on_top(ax_slip, *ax_slip.get_legend_handles_labels(), 2)
    return fig


def _ring_path(rings):
    """A matplotlib Path of a polygon's rings (exterior, holes), each (k, 2) m."""
    from matplotlib.path import Path

    verts, codes = [], []
    for r in rings:
        r = np.asarray(r, dtype=float)
        verts += list(r) + [r[0]]
        codes += [Path.MOVETO] + [Path.LINETO] * (len(r) - 1) + [Path.CLOSEPOLY]
    return Path(np.array(verts), codes)


FLOOR_FILL, FLOOR_EDGE, SWEPT = "#ACA8A0", "#403E3A", "#0072B2"


def _draw_floor(ax, floor, clearance, box):
    """Floor features, swept area, closest pair and first contact on ``ax``.

    Returns the box (x0, x1, y0, y1) m of what should stay in view: the swept
    area, the closest pair, and the features within 1 m of the path.
    """
    import shapely
    from matplotlib.patches import PathPatch
    from sim.runs.clearance import feature_geometry

    b = np.array(box)
    x0, x1, y0, y1 = b[:, 0].min(), b[:, 1].max(), b[:, 2].min(), b[:, 3].max()
    pts = [(x0, y0), (x1, y1)]
    near_box = shapely.box(x0 - 1.0, y0 - 1.0, x1 + 1.0, y1 + 1.0)
    first_poly = first_line = True
    for f in floor.features:
        g = shapely.intersection(feature_geometry(f), near_box)
        if not g.is_empty:
            gx0, gy0, gx1, gy1 = g.bounds
            pts += [(gx0, gy0), (gx1, gy1)]
        if f.kind == "polygon":
            for rings in f.parts:
                ax.add_patch(PathPatch(_ring_path(rings), facecolor=FLOOR_FILL, edgecolor=FLOOR_EDGE, lw=1.2,
                                       zorder=1.5, label="floor: solid feature" if first_poly else None))
                first_poly = False
        else:
            for p in f.parts:
                ax.plot(p[:, 0], p[:, 1], "-", color=FLOOR_EDGE, lw=2.2, zorder=1.5,
                        label="floor: wall line" if first_line else None)
                first_line = False
    if clearance is None:
        return _box_of(pts)
    if clearance.swept is not None and not clearance.swept.is_empty:
        first = True
        for poly in shapely.get_parts(clearance.swept):
            rings = [np.asarray(poly.exterior.coords)[:-1]] + [np.asarray(h.coords)[:-1] for h in poly.interiors]
            ax.add_patch(PathPatch(_ring_path(rings), facecolor=SWEPT, alpha=0.18, edgecolor="none", zorder=0.5,
                                   label=f"swept area {clearance.swept_area:.2f} m^2" if first else None))
            first = False
        sx0, sy0, sx1, sy1 = clearance.swept.bounds
        pts += [(sx0, sy0), (sx1, sy1)]
    n = clearance.nearest
    if n is not None:
        (ax_, ay), (bx, by) = n.base_point, n.feature_point
        col = PEAK if n.distance <= 0 else "#1E1E1E"
        ax.plot([ax_, bx], [ay, by], "-o", color=col, ms=5, mfc="white", lw=1.6, zorder=5,
                label=f"closest: {n.distance * 1000:.0f} mm to {n.feature} at {n.t:g} s")
        pts += [(ax_, ay), (bx, by)]
    c = clearance.first_contact
    if c is not None:
        ax.plot([c.point[0]], [c.point[1]], "X", color=PEAK, ms=11, mec="white", zorder=6,
                label=f"first contact: {c.feature} at {c.t:g} s")
    return _box_of(pts)


def _box_of(pts):
    a = np.array(pts, dtype=float)
    return (a[:, 0].min(), a[:, 0].max(), a[:, 1].min(), a[:, 1].max())


def plot_traces(path, out, compare=None, max_rows: int = 20000, floor=None, outline=None):
    """Read ``path`` (and ``compare``), write the figure as PNG to ``out`` (:mod:`sim.files.atomic`).

    ``floor`` (:class:`~sim.model.floor.Floor`) with ``outline`` (the footprint,
    (k, 2) m body frame) measures the first trace's clearance on every row and
    draws it; the result is also kept as ``traces[0].clearance``.  Returns ``(figure, traces)``.
    """
    meter = None
    if floor is not None:
        from sim.runs.clearance import ClearanceMeter
        meter = ClearanceMeter(outline, floor, swept=True)

    def measure(header, block, page):
        idx = [header.index(c) for c in REQUIRED]
        bad = np.flatnonzero(~np.all(np.isfinite(block[:, idx]), axis=1))
        if len(bad):
            raise page.error(int(bad[0]), "a blank t, x, y or theta: the clearance needs a pose on every row")
        meter.add(block[:, idx[0]], block[:, idx[1:]])
    traces = [read_trace(path, max_rows, measure if meter is not None else None)]
    if compare:
        traces.append(read_trace(compare, max_rows))
    d = os.path.dirname(os.path.abspath(out))
    if not os.path.isdir(d):
        raise InputError("-o", None, f"directory '{os.path.dirname(out) or '.'}' does not exist")
    clearance = traces[0].clearance = meter.result() if meter is not None else None
    fig = figure(traces, floor, clearance)
    _save_png(fig, out, metadata={"Software": None})
    return fig, traces


def _save_png(fig, path, **kw) -> None:
    """Write ``fig`` as a PNG at ``path``, whole or not at all (:mod:`sim.files.atomic`)."""
    import io

    from sim.files.atomic import write_bytes
    buf = io.BytesIO()
    fig.savefig(buf, format="png", **kw)
    write_bytes(path, buf.getvalue(), "the PNG")


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
    _save_png(fig, path)
    return True
