"""``trundle study --plot PNG``: the trade-off between two figures and how one figure follows each parameter.

matplotlib only inside :func:`figure` (Agg canvas, no pyplot state).  The first panel
plots every ok variant at (figure A, figure B), the Pareto front (no other variant better
on both) joined by a line and ringed, each front point labelled with its variant number.
Then one panel per parameter: the sort figure against that parameter's value over every
ok variant (the other parameters vary among the points, so a spread at one value shows
how much they matter), with the mean at each value joined by a line when the parameter
takes few values.  Variants that are not ok are marked along the bottom edge as crosses.
Colours from the Okabe-Ito set; the front is also told by its marker and line.
"""
from __future__ import annotations

import io
import math

from sim.files.atomic import write_bytes
from sim.files.studyfile import figure_of
from sim.runs.study import pareto

POINT, FRONT, BAD, MEAN = "#56B4E9", "#D55E00", "#999999", "#000000"


def _label(col):
    unit = figure_of(col)[1]
    return f"{col} ({unit})" if unit else col


def _ok(rows, *cols):
    return [r for r in rows if r["status"] == "ok"
            and all(isinstance(r.get(c), (int, float)) and math.isfinite(r[c]) for c in cols)]


def figure(run, sort, pair=None):
    """The matplotlib Figure: Pareto panel (when ``pair``) then one panel per parameter."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    params = [p.name for p in run.study.parameters]
    n = len(params) + (1 if pair else 0)
    ncol = min(3, n)
    nrow = math.ceil(n / ncol)
    fig = Figure(figsize=(5.0 * ncol, 4.2 * nrow), dpi=100)
    FigureCanvasAgg(fig)
    axes = [fig.add_subplot(nrow, ncol, k + 1) for k in range(n)]
    k = 0
    if pair:
        a, b = pair
        ax = axes[0]
        pts = _ok(run.rows, a, b)
        ax.scatter([r[a] for r in pts], [r[b] for r in pts], s=18, color=POINT, label="variants", zorder=2)
        front = pareto(run.rows, a, b)
        if front:
            ax.plot([r[a] for r in front], [r[b] for r in front], color=FRONT, lw=1.5, ls="--",
                    marker="o", mfc="none", ms=9, mew=1.5, label="Pareto front", zorder=3)
            at = {}
            for r in front:  # variants at the same point share one label
                at.setdefault((r[a], r[b]), []).append(str(r["variant"]))
            for (x, y), names in at.items():
                text = ", ".join(names) if len(names) <= 4 else f"{', '.join(names[:3])} +{len(names) - 3}"
                ax.annotate(text, (x, y), textcoords="offset points", xytext=(5, 5), fontsize=8)
        if not pts:
            ax.text(0.5, 0.5, "no ok variant with both figures", ha="center", va="center", transform=ax.transAxes)
        best = lambda c: "lower is better" if figure_of(c)[2] == "low" else "higher is better"
        ax.set_xlabel(f"{_label(a)}, {best(a)}")
        ax.set_ylabel(f"{_label(b)}, {best(b)}")
        ax.set_title(f"trade-off: {a} against {b}", fontsize=10)
        ax.grid(True, alpha=0.3)
        ax.legend(fontsize=8, loc="best")
        k = 1
    ok = _ok(run.rows, sort)
    bad = [r for r in run.rows if r not in ok]
    for p in params:
        ax = axes[k]
        k += 1
        xs = [r[p] for r in ok]
        ax.scatter(xs, [r[sort] for r in ok], s=16, color=POINT, label="ok variants", zorder=2)
        values = sorted(set(xs))
        if 1 < len(values) <= 50 and len(values) < len(xs):
            means = [sum(r[sort] for r in ok if r[p] == v) / sum(1 for r in ok if r[p] == v) for v in values]
            ax.plot(values, means, color=MEAN, lw=1.2, label="mean at each value", zorder=3)
        elif len(values) == len(xs) and len(xs) > 1:
            order = sorted(ok, key=lambda r: r[p])
            ax.plot([r[p] for r in order], [r[sort] for r in order], color=MEAN, lw=0.8, alpha=0.6, zorder=1)
        if bad:
            ax.plot([r[p] for r in bad], [0.0] * len(bad), "x", color=BAD, ms=7, mew=1.5,
                    transform=ax.get_xaxis_transform(), clip_on=False, label="not ok", zorder=4)
        if not ok:
            ax.text(0.5, 0.5, "no ok variant", ha="center", va="center", transform=ax.transAxes)
        ax.set_xlabel(p)
        ax.set_ylabel(_label(sort))
        ax.set_title(f"{sort} against {p}", fontsize=10)
        ax.grid(True, alpha=0.3)
        ax.legend(fontsize=8, loc="best")
    fig.suptitle(f"design study {run.study.source}: {len(run.rows)} variants", fontsize=11)
    fig.tight_layout()
    return fig


def plot_study(path, run, sort, pair=None) -> None:
    """Write :func:`figure` as a PNG (same input, same bytes: no timestamp)."""
    fig = figure(run, sort, pair)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", metadata={"Software": None})
    write_bytes(path, buf.getvalue(), "the plot")
