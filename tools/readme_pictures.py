"""Regenerate the README's pictures in docs/ (run from the repository root).

    python tools/readme_pictures.py

* docs/ward-cart-arc.png: ``trundle run scenarios/ward-cart-arc.yaml --png``, the final frame;
* docs/field-rover-skid-turn.png: the skid-steer turn at t = 2.5 s (``--png --at 2.5``), every
  wheel but the middle pair skidding;
* docs/field-rover-skid-turn-plot.png: ``trundle plot`` of that run;
* docs/mecanum-rollers.png: the roller angles of a mecanum base (matplotlib drawing, below).

Each picture is deterministic: the same code gives the same bytes.
"""
from __future__ import annotations

import math
import os
import sys
import tempfile

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
DOCS = os.path.join(ROOT, "docs")


def mecanum_picture(path) -> None:
    """A top view of the bundled mecanum tote (front up, left to the left), twice: the rollers on top
    as seen from above (the X), and the axes of the rollers touching the floor, whose angle from the
    wheel's heading is the file's ``roller``."""
    import io

    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.patches import FancyArrowPatch, Rectangle

    from sim.files.atomic import write_bytes
    from sim.files.robotfile import load_robot

    robot = load_robot(os.path.join(ROOT, "scenarios", "robots", "tote-mecanum.yaml"))
    fig = Figure(figsize=(9.0, 3.9), dpi=100)
    FigureCanvasAgg(fig)

    def screen(x, y):                      # body (x forward, y left) -> picture (right, up)
        return -y, x

    L, Wd = robot.length, robot.width
    panels = (("seen from above: the rollers on top form an X", -1, "#8FA6C0"),
              ("the rollers touching the floor: the file's roller angle", 1, "#56B4E9"))
    for k, (title, sign, col) in enumerate(panels):
        ax = fig.add_axes((0.01 + 0.5 * k, 0.0, 0.48, 0.88))
        ax.set_aspect("equal")
        ax.axis("off")
        ax.set_title(title, fontsize=10)
        ax.add_patch(Rectangle(screen(L / 2, Wd / 2), Wd, -L, facecolor="#DAE5F0", edgecolor="#0072B2", lw=2))
        for w in robot.wheels:
            cu, cv = screen(w.x, w.y)
            r, hw = w.radius * 1.7, 0.032
            ax.add_patch(Rectangle((cu - hw, cv - r), 2 * hw, 2 * r, facecolor="#26384F", edgecolor="black",
                                   lw=1, zorder=3))
            g = w.heading + sign * w.roller                   # top rollers look mirrored from above
            du, dv = screen(math.cos(g), math.sin(g))
            for f in ((-0.55, 0.0, 0.55) if sign < 0 else (0.0,)):
                n = 0.04 if sign < 0 else 0.11
                mu, mv = cu, cv + f * r
                ax.plot([mu - du * n, mu + du * n], [mv - dv * n, mv + dv * n], color=col,
                        lw=2.5 if sign < 0 else 3.5, solid_capstyle="round", zorder=4)
            if sign > 0:
                side = 1 if w.y < 0 else -1
                ax.text(cu + side * 0.1, cv, f"{w.name}\nroller: {round(math.degrees(w.roller))} deg",
                        ha="left" if side > 0 else "right", va="center", fontsize=9)
        o = screen(0.0, 0.0)
        ax.add_patch(FancyArrowPatch(o, screen(0.15, 0.0), arrowstyle="-|>", mutation_scale=12, color="black"))
        ax.add_patch(FancyArrowPatch(o, screen(0.0, 0.11), arrowstyle="-|>", mutation_scale=12, color="black"))
        ax.text(*screen(0.165, 0.0), "x (front)", ha="center", va="bottom", fontsize=8)
        ax.text(*screen(0.0, 0.125), "y", ha="right", va="center", fontsize=8)
        ax.set_xlim(-0.56, 0.56)
        ax.set_ylim(-0.42, 0.40)
    fig.suptitle("mecanum rollers of tote-mecanum, front up", fontsize=11)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", metadata={"Software": None})
    write_bytes(path, buf.getvalue(), "the picture")


def main() -> int:
    sys.path.insert(0, ROOT)
    from sim.cli.app import main as trundle

    scen = os.path.join(ROOT, "scenarios")
    steps = [["run", os.path.join(scen, "ward-cart-arc.yaml"), "--png", os.path.join(DOCS, "ward-cart-arc.png")],
             ["run", os.path.join(scen, "field-rover-skid-turn.yaml"), "--png",
              os.path.join(DOCS, "field-rover-skid-turn.png"), "--at", "2.5"]]
    with tempfile.TemporaryDirectory() as tmp:
        trace = os.path.join(tmp, "field-rover-skid-turn.csv")
        steps += [["run", os.path.join(scen, "field-rover-skid-turn.yaml"), "--csv", trace],
                  ["plot", trace, "-o", os.path.join(DOCS, "field-rover-skid-turn-plot.png")]]
        for argv in steps:
            code = trundle(argv)
            if code != 0:
                return code
    mecanum_picture(os.path.join(DOCS, "mecanum-rollers.png"))
    print(f"wrote {os.path.join(DOCS, 'mecanum-rollers.png')}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
