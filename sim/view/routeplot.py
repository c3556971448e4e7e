"""``trundle route --plot PNG``: the route, how each base drives it, and the speed profiles.

matplotlib only inside :func:`plot_route` (Agg canvas, no pyplot state).  Three panels:
the route in the world frame (path, waypoints numbered, each base's heading drawn as
ticks along the path and its stops marked); path speed against distance along the
route; path speed against time (turns in place and re-steering show as time spent at
zero speed).  Colours from the Okabe-Ito set, one per base, with a distinct line style
and marker each so that no meaning rests on colour alone.
"""
from __future__ import annotations

import io

import numpy as np

from sim.files.atomic import write_bytes
from sim.theory.speedplan import PHASE_DRIVE

COLOURS = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000")
STYLES = ("-", "--", "-.", ":", (0, (5, 1, 1, 1)), (0, (3, 1)), (0, (1, 1)))
MARKERS = ("o", "s", "^", "D", "v", "P", "X")
ROUTE = "#999999"


def figure(route, plans):
    """The matplotlib Figure (3 panels) for ``plans`` of one ``route``."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(13.0, 10.0), dpi=100)
    FigureCanvasAgg(fig)
    gs = fig.add_gridspec(2, 2, height_ratios=(1.15, 1.0), hspace=0.28, wspace=0.18,
                          left=0.06, right=0.98, top=0.95, bottom=0.06)
    ax_p = fig.add_subplot(gs[0, :])
    ax_s = fig.add_subplot(gs[1, 0])
    ax_t = fig.add_subplot(gs[1, 1])
    feasible = [p for p in plans if p.feasible]
    path = feasible[0].path if feasible else route.sample(max(route.length / 2000, 1e-3))
    ax_p.plot(path.xy[:, 0], path.xy[:, 1], color=ROUTE, lw=6, alpha=0.45, solid_capstyle="round",
              label="route", zorder=1)
    wp = route.waypoints
    ax_p.plot(wp[:, 0], wp[:, 1], ls="none", marker="o", ms=7, mfc="white", mec="#333333", zorder=4)
    span = max(np.ptp(path.xy[:, 0]), np.ptp(path.xy[:, 1]), 1e-3)
    for i, (x, y) in enumerate(wp):
        ax_p.annotate(str(i), (x, y), xytext=(6, 6), textcoords="offset points", fontsize=9, color="#333333")
    tick = 0.03 * span
    for n, p in enumerate(plans):
        col, st, mk = COLOURS[n % 7], STYLES[n % 7], MARKERS[n % 7]
        label = f"{p.robot}: {p.time:.2f} s" if p.feasible else f"{p.robot}: not feasible"
        if not p.feasible:
            ax_s.plot([], [], color=col, ls=st, label=label)
            continue
        # heading ticks along the path, offset sideways a little per base so they do not hide each other
        drive = p.phase == PHASE_DRIVE
        pose = p.pose[drive]
        g = np.array(p.motion.guide[:2])
        c, s = np.cos(pose[:, 2]), np.sin(pose[:, 2])
        gxy = np.stack([pose[:, 0] + c * g[0] - s * g[1], pose[:, 1] + s * g[0] + c * g[1]], axis=1)
        d = np.concatenate([[0.0], np.cumsum(np.hypot(*np.diff(gxy, axis=0).T))])
        picks = np.searchsorted(d, np.arange(0.0, d[-1] + 1e-9, max(d[-1] / 28, 1e-6)))
        picks = np.unique(np.clip(picks, 0, len(d) - 1))
        off = (n - (len(plans) - 1) / 2) * 0.012 * span
        nx, ny = -np.sin(pose[picks, 2]), np.cos(pose[picks, 2])
        bx, by = gxy[picks, 0] + off * nx, gxy[picks, 1] + off * ny
        ax_p.quiver(bx, by, c[picks] * tick, s[picks] * tick, angles="xy", scale_units="xy", scale=1,
                    color=col, width=0.0022, headwidth=4, headlength=4, headaxislength=3.5, zorder=3)
        ax_p.plot([], [], color=col, ls=st, marker=mk, label=f"{p.robot} heading")
        for stop in p.stops:
            x, y = route.waypoints[stop["waypoint"]]
            if stop["turn_time"] or stop["resteer_time"]:
                ax_p.plot([x], [y], ls="none", marker=mk, ms=11 + 3 * n, mfc="none", mec=col, mew=1.8, zorder=5)
        # speed along the route and against time
        ax_s.plot(p.path.s, p.profile, color=col, ls=st, lw=1.8, label=label)
        v = np.where(p.phase == PHASE_DRIVE, p.speed, 0.0)
        ax_t.plot(p.t, v, color=col, ls=st, lw=1.8, label=label)
    if feasible:
        for s in feasible[0].path.waypoint_s[1:-1]:
            ax_s.axvline(s, color="#bbbbbb", lw=0.8, zorder=0)
    ax_p.set_aspect("equal", adjustable="datalim")
    ax_p.plot([], [], ls="none", marker="o", ms=10, mfc="none", mec="#333333", label="stop to turn or re-steer")
    ax_p.set_xlabel("x (m)")
    ax_p.set_ylabel("y (m)")
    ax_p.set_title(f"route {route.name}: each base's heading along the path (arrows), waypoints numbered",
                   fontsize=10)
    ax_p.legend(loc="upper left", fontsize=8, ncols=2)
    ax_p.grid(True, color="#eeeeee")
    ax_s.set_xlabel("distance along the route (m); grey lines: waypoints")
    ax_s.set_ylabel("path speed (m/s)")
    ax_s.set_title("fastest speed along the route", fontsize=10)
    ax_s.legend(loc="upper right", fontsize=8)
    ax_s.grid(True, color="#eeeeee")
    ax_t.set_xlabel("time (s)")
    ax_t.set_ylabel("path speed (m/s)")
    ax_t.set_title("against time: flat at zero while turning in place or re-steering", fontsize=10)
    ax_t.legend(loc="upper right", fontsize=8)
    ax_t.grid(True, color="#eeeeee")
    for ax in (ax_s, ax_t):
        ax.set_ylim(bottom=0.0)
    return fig


def plot_route(path, route, plans) -> None:
    """Write the figure as PNG to ``path`` (written whole or not at all)."""
    fig = figure(route, plans)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", metadata={"Software": None})
    write_bytes(path, buf.getvalue(), "the plot")
