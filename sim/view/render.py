"""Drawing a base in the plane, for the window and for headless pictures alike.

This is the one module that imports pygame, and only inside functions, so
``import sim.render`` stays cheap and the rest of Trundle never loads it.

One :class:`Renderer` draws every frame onto its own off-screen
``pygame.Surface``; a :class:`Window` only copies that surface to the screen,
so a window and a PNG show the same pixels for the same state.

Layout (pixels, origin top left, v downwards): a side panel ``PANEL_W`` wide
on the left (state, analysis, slip, legend) and the world view to its right.
World to screen (:class:`View`): ``u = u0 + s (x - cx)``, ``v = v0 - s (y - cy)``
with ``s`` in px/m, ``(cx, cy)`` the world point (m) shown at the view's
centre pixel ``(u0, v0)``; world x points right, world y up.

Colours (:data:`PALETTE`) come from the Okabe-Ito set, picked so that no
meaning rests on a red/green difference: clean wheels are dark navy and turn
orange as they skid, skid arrows are vermillion, axle lines sky blue, the ICR
reddish purple, the path bluish green.  Shapes carry meaning as well (ring =
ICR, edge triangle = ICR off the view, hollow double arrow = ICR at infinity).

With a floor (:class:`~sim.model.floor.Floor`) the renderer also draws its
features (solid polygons grey, lines dark grey), the area swept so far
(translucent blue), and the closest pair of points between base and floor so
far with its distance; a contact is drawn in vermillion, the warning colour.
The measuring is :class:`sim.runs.clearance.ClearanceMeter`, fed the rows as
they are observed.
"""
from __future__ import annotations

import math
import os
from collections import deque

import numpy as np

from sim.files.text import fixed

DEFAULT_SIZE = (1120, 720)
PANEL_W = 320

PALETTE = {
    "paper": (247, 245, 240),
    "grid": (228, 225, 217),
    "grid_major": (205, 201, 191),
    "grid_axis": (165, 160, 150),
    "ink": (30, 30, 30),
    "muted": (105, 105, 105),
    "panel": (255, 255, 255),
    "panel_edge": (190, 186, 178),
    "body_fill": (218, 229, 240),
    "body_edge": (0, 114, 178),       # Okabe-Ito blue
    "ghost": (190, 204, 218),
    "wheel_clean": (38, 56, 84),      # dark navy: rolling without slip
    "wheel_slip": (230, 159, 0),      # Okabe-Ito orange: fully skidding
    "skid": (213, 94, 0),             # Okabe-Ito vermillion: skid velocity arrows, warnings
    "axle": (86, 180, 233),           # Okabe-Ito sky blue: axle (no-slide) lines
    "icr": (204, 121, 167),           # Okabe-Ito reddish purple
    "path": (0, 158, 115),            # Okabe-Ito bluish green
    "route": (178, 178, 178),         # grey band: the planned route
    "target": (240, 228, 66),         # Okabe-Ito yellow (black outline): the controller's target point
    "roller": (150, 170, 195),
    "ball": (200, 200, 200),
    "floor_fill": (172, 168, 160),    # solid floor features (shelves, door frames, keep-out zones)
    "floor_edge": (64, 62, 58),       # their outlines, and wall lines
    "swept": (0, 114, 178, 44),       # Okabe-Ito blue, translucent: area swept so far
    "closest": (30, 30, 30),          # the closest pair of points
}

SLIP_FULL = 0.05        # m/s: wheel drawn fully orange at this skid speed
ARROW_SCALE = 400.0     # px per m/s of skid velocity
ARROW_MAX = 140.0       # px: longer arrows are capped (and drawn with a bar)
TRAIL_STEP = 0.004      # m: a pose joins the trail after moving this far (or 1 deg)
TRAIL_LEN = 5000        # poses kept in the trail
GHOST_LEN = 40          # earlier footprints kept
BALL_MIN_PX = 7         # px: smallest radius a ball wheel's disc is drawn with
_SPEED_EPS = 1e-9       # m/s: slower than this the base counts as at rest
STATUS_CHECKS = 8       # checks listed in the status box (the rest counted)


class Status:
    """What the window's status box says: ``state`` (``playing`` | ``paused`` | ``finished``),
    ``speed`` (factor of real time) and ``checks``, (passed, text) pairs shown once finished."""

    __slots__ = ("state", "speed", "checks")

    def __init__(self, state: str, speed: float = 1.0, checks=()):
        self.state, self.speed, self.checks = state, float(speed), tuple(checks)


def _pg():
    """pygame, imported on first use (quietly)."""
    os.environ.setdefault("PYGAME_HIDE_SUPPORT_PROMPT", "1")
    import pygame
    return pygame


def use_headless() -> None:
    """Make SDL use no display at all (``SDL_VIDEODRIVER=dummy``) unless video is already up."""
    import sys
    pg = sys.modules.get("pygame")
    if pg is None or not pg.display.get_init():
        os.environ["SDL_VIDEODRIVER"] = "dummy"
        os.environ.setdefault("SDL_AUDIODRIVER", "dummy")


def _mix(a, b, f):
    f = min(max(float(f), 0.0), 1.0)
    return tuple(int(round(a[i] + (b[i] - a[i]) * f)) for i in range(3))


def slip_colour(speed: float) -> tuple:
    """RGB of a wheel skidding at ``speed`` m/s: navy at 0, orange at ``SLIP_FULL`` and above."""
    return _mix(PALETTE["wheel_clean"], PALETTE["wheel_slip"], speed / SLIP_FULL)


def nice_step(target: float) -> float:
    """Smallest 1, 2 or 5 x 10^k that is >= ``target`` (> 0)."""
    k = math.floor(math.log10(target))
    for m in (1.0, 2.0, 5.0, 10.0):
        if m * 10.0 ** k >= target * (1 - 1e-12):
            return m * 10.0 ** k
    return 10.0 ** (k + 1)


# --------------------------------------------------------------------------
# world <-> screen


class View:
    """The world-to-screen transform of the world view.

    rect : (left, top, width, height) px, the part of the surface it fills.
    center : (2,) m, world point shown at the rect's centre pixel.
    scale : px/m.
    """

    MIN_SCALE, MAX_SCALE = 2.0, 20000.0

    def __init__(self, rect, center=(0.0, 0.0), scale=150.0):
        self.rect = tuple(int(v) for v in rect)
        self.center = np.array(center, dtype=float)
        self.scale = float(scale)

    @property
    def origin(self) -> tuple:
        """(u0, v0) px, the centre pixel of the rect."""
        l, t, w, h = self.rect
        return (l + w / 2.0, t + h / 2.0)

    def to_screen(self, x, y):
        """Screen (u, v) px (floats or arrays) of world (x, y) m."""
        u0, v0 = self.origin
        return (u0 + self.scale * (np.asarray(x) - self.center[0]),
                v0 - self.scale * (np.asarray(y) - self.center[1]))

    def to_world(self, u, v):
        """World (x, y) m of screen (u, v) px."""
        u0, v0 = self.origin
        return (self.center[0] + (np.asarray(u) - u0) / self.scale,
                self.center[1] - (np.asarray(v) - v0) / self.scale)

    def zoom(self, factor: float, about=None) -> None:
        """Scale by ``factor`` keeping the world point under pixel ``about`` in place."""
        about = self.origin if about is None else about
        wx, wy = self.to_world(*about)
        self.scale = min(max(self.scale * factor, self.MIN_SCALE), self.MAX_SCALE)
        u0, v0 = self.origin
        self.center = np.array([wx - (about[0] - u0) / self.scale, wy + (about[1] - v0) / self.scale])

    def pan(self, du: float, dv: float) -> None:
        """Move the picture by (du, dv) px."""
        self.center = self.center + np.array([-du / self.scale, dv / self.scale])

    def fit(self, xmin, xmax, ymin, ymax, margin=36) -> None:
        """Centre on the box (m) and scale it to fill the rect less ``margin`` px."""
        _, _, w, h = self.rect
        sx = max(w - 2 * margin, 10) / max(xmax - xmin, 1e-9)
        sy = max(h - 2 * margin, 10) / max(ymax - ymin, 1e-9)
        self.scale = min(max(min(sx, sy), self.MIN_SCALE), self.MAX_SCALE)
        self.center = np.array([(xmin + xmax) / 2.0, (ymin + ymax) / 2.0])

    def inside(self, u, v, inset=0.0) -> bool:
        l, t, w, h = self.rect
        return l + inset <= u <= l + w - inset and t + inset <= v <= t + h - inset

    def clip_line(self, p, d):
        """The part inside the rect of the infinite line through pixel ``p`` along ``d``.

        Returns ((u1, v1), (u2, v2)) or None (Liang-Barsky clipping).
        """
        l, t, w, h = self.rect
        lo, hi = -1e9, 1e9
        for pc, dc, a, b in ((p[0], d[0], l, l + w - 1), (p[1], d[1], t, t + h - 1)):
            if abs(dc) < 1e-12:
                if pc < a or pc > b:
                    return None
                continue
            s1, s2 = (a - pc) / dc, (b - pc) / dc
            lo, hi = max(lo, min(s1, s2)), min(hi, max(s1, s2))
        if lo > hi:
            return None
        return ((p[0] + lo * d[0], p[1] + lo * d[1]), (p[0] + hi * d[0], p[1] + hi * d[1]))

    def edge_point(self, target, inset=26.0):
        """Where the ray from the centre pixel toward pixel ``target`` meets the rect inset by ``inset`` px."""
        u0, v0 = self.origin
        du, dv = target[0] - u0, target[1] - v0
        _, _, w, h = self.rect
        k = min((w / 2 - inset) / abs(du) if abs(du) > 1e-12 else math.inf,
                (h / 2 - inset) / abs(dv) if abs(dv) > 1e-12 else math.inf)
        return (u0 + k * du, v0 + k * dv)


# --------------------------------------------------------------------------
# what a frame says besides the picture (pure, no pygame)


def command_notes(robot, row, align="wait", align_tolerance=None) -> list:
    """Why the base is not doing what it was asked, as short sentences (may be empty): what
    the engine recorded in the row (:func:`sim.engine.notes.row_notes`), plus an
    under-determined motion (rank < 3).  ``align_tolerance`` is unused (the engine decided)."""
    from sim.engine.notes import row_notes

    out = row_notes(robot, row, align)
    if row.rank < 3:
        out.append(f"motion partly undetermined by the driven wheels (rank {row.rank})")
    return out


def wheel_skid(robot, row) -> np.ndarray:
    """Skid velocity of each wheel's contact, shape (n, 2) m/s in the body frame.

    ``slip_long`` along the rolling direction (heading + roller) plus
    ``slip_lat`` along the axle (heading + 90 deg); missing rows count as 0.
    """
    a = robot.arrays
    h = np.asarray(row.steer, dtype=float)
    sl = np.nan_to_num(np.asarray(row.slip_long, dtype=float))
    st = np.nan_to_num(np.asarray(row.slip_lat, dtype=float))
    roll = h + a.roller
    return np.stack([sl * np.cos(roll) - st * np.sin(h), sl * np.sin(roll) + st * np.cos(h)], axis=1)


def reach(robot) -> float:
    """m, the farthest point of footprint or wheel from the body origin."""
    r = float(np.max(np.hypot(robot.outline[:, 0], robot.outline[:, 1])))
    for w in robot.wheels:
        r = max(r, math.hypot(w.x, w.y) + w.trail + w.radius)
    return r


# --------------------------------------------------------------------------
# the renderer


class Renderer:
    """Draws frames of one base onto an off-screen surface.

    Parameters
    ----------
    robot : Robot
    size : (width, height) px of the frame.
    title : str, shown under the robot's name (scenario file, "drive", ...).
    align : str, the steering policy shown in the panel (may change).
    step : float or None, s, shown in the panel.
    floor : :class:`~sim.model.floor.Floor` or None: draw it, the swept area and the closest pair.

    Feed every row to :meth:`observe` (trail, bounds, peak slip, clearance); call
    :meth:`draw` when a frame is wanted.  ``view`` (a :class:`View`) and
    ``follow`` (keep the base centred) are the user's to change.
    """

    def __init__(self, robot, size=DEFAULT_SIZE, title="", align="wait", step=None,
                 align_tolerance=None, floor=None):
        from sim.theory.analysis import analyze

        self.robot = robot
        self.floor = floor if floor is not None and len(floor) else None
        self.size = (int(size[0]), int(size[1]))
        self.title = title
        self.align = align
        self.align_tolerance = align_tolerance
        self.step = step
        self.view = View((PANEL_W, 0, self.size[0] - PANEL_W, self.size[1]))
        self.follow = False
        self.analysis = analyze(robot)
        self._reach = reach(robot)
        self._fonts = {}
        self._surface = None
        self.texts, self.reserved = [], []
        self.route_xy = None
        self.waypoints = None
        self.plan = None
        self.reset()

    def set_route(self, path_xy=None, waypoints=None, plan=None) -> None:
        """Draw a route under the base: its path (P, 2) m as a grey band, its waypoints (k, 2) m
        as white circles and, given the plan being tracked (:class:`sim.theory.speedplan.Plan`),
        the controller's target point at each row's time as a yellow diamond."""
        self.route_xy = None if path_xy is None else np.asarray(path_xy, dtype=float)
        self.waypoints = None if waypoints is None else np.asarray(waypoints, dtype=float).reshape(-1, 2)
        self.plan = plan

    def target(self, t):
        """World (x, y) m of the tracked point's reference at time t (s), or None without a plan."""
        if self.plan is None:
            return None
        from sim.engine.tracking import reference

        p = self.plan
        out = np.empty(3)
        reference(p.t, p.pose, p.speed, float(t), out)
        gx, gy, _ = p.motion.guide
        c, s = math.cos(out[2]), math.sin(out[2])
        return out[0] + c * gx - s * gy, out[1] + s * gx + c * gy

    # -- state --------------------------------------------------------------
    def reset(self) -> None:
        """Forget the trail, bounds and peak slip (a restart)."""
        self.trail = deque(maxlen=TRAIL_LEN)
        self.ghosts = deque(maxlen=GHOST_LEN)
        self.bounds = None
        self.peak = (0.0, 0.0)
        self._ghost_from = None
        self.meter = None
        self._pending = []
        if self.floor is not None:
            from sim.runs.clearance import ClearanceMeter
            self.meter = ClearanceMeter(self.robot.outline, self.floor, swept=True)

    def snapshot(self) -> tuple:
        """What :meth:`observe` has gathered (trail, earlier footprints, peak slip), to :meth:`restore` later.

        The bounds are not part of it: they keep covering everything seen.
        """
        return (tuple(self.trail), tuple(self.ghosts), self.peak, self._ghost_from)

    def restore(self, snap) -> None:
        """Go back to a :meth:`snapshot` (the bounds stay)."""
        trail, ghosts, self.peak, self._ghost_from = snap
        self.trail = deque(trail, maxlen=TRAIL_LEN)
        self.ghosts = deque(ghosts, maxlen=GHOST_LEN)

    def observe(self, row) -> None:
        """Take row k into the trail, the bounds and the peak slip."""
        x, y, th = (float(v) for v in row.pose)
        if not self.trail or math.hypot(x - self.trail[-1][0], y - self.trail[-1][1]) >= TRAIL_STEP \
                or abs(th - self.trail[-1][2]) >= math.radians(1.0):
            self.trail.append((x, y, th))
        if self._ghost_from is None:
            self._ghost_from = (x, y, th)
            self.ghosts.append((x, y, th))
        else:
            gx, gy, gth = self._ghost_from
            if math.hypot(x - gx, y - gy) >= 1.25 * self.robot.length or abs(th - gth) >= math.radians(30):
                self._ghost_from = (x, y, th)
                self.ghosts.append((x, y, th))
        b = self.bounds
        self.bounds = (x, x, y, y) if b is None else (min(b[0], x), max(b[1], x), min(b[2], y), max(b[3], y))
        if row.slip > self.peak[0]:
            self.peak = (float(row.slip), float(row.t))
        if self.meter is not None:
            self._pending.append((float(row.t), x, y, th))

    def clearance(self):
        """The :class:`~sim.runs.clearance.ClearanceMeter` with every row observed so far, or None."""
        if self.meter is not None and self._pending:
            a = np.array(self._pending)
            self._pending = []
            self.meter.add(a[:, 0], a[:, 1:])
        return self.meter

    def fit(self, bounds=None) -> None:
        """Fit the view to ``bounds`` (xmin, xmax, ymin, ymax) m, or to all poses seen."""
        b = bounds if bounds is not None else self.bounds
        pts = [p for p in (self.route_xy, self.waypoints) if p is not None and len(p)]
        if pts:
            q = np.vstack(pts)
            rb = (float(q[:, 0].min()), float(q[:, 0].max()), float(q[:, 1].min()), float(q[:, 1].max()))
            b = rb if b is None else (min(b[0], rb[0]), max(b[1], rb[1]), min(b[2], rb[2]), max(b[3], rb[3]))
        if b is None:
            b = (0.0, 0.0, 0.0, 0.0)
        r = self._reach * 1.15
        if self.floor is not None:
            b = self._with_floor(b, max(3 * self._reach, 1.0))
        cx, cy = (b[0] + b[1]) / 2, (b[2] + b[3]) / 2
        hw = max((b[1] - b[0]) / 2 + r, 2.5 * r)
        hh = max((b[3] - b[2]) / 2 + r, 2.5 * r)
        self.view.fit(cx - hw, cx + hw, cy - hh, cy + hh)

    def _with_floor(self, b, margin):
        """The box ``b`` grown to take in the floor features within ``margin`` m of it."""
        import shapely
        from sim.runs.clearance import feature_geometry

        box = shapely.box(b[0] - margin, b[2] - margin, b[1] + margin, b[3] + margin)
        near = shapely.intersection(np.array([feature_geometry(f) for f in self.floor.features]), box)
        near = near[~shapely.is_empty(near)]
        if not len(near):
            return b
        x0, y0, x1, y1 = shapely.total_bounds(near)
        return (min(b[0], x0), max(b[1], x1), min(b[2], y0), max(b[3], y1))

    # -- drawing helpers ----------------------------------------------------
    def _font(self, size):
        f = self._fonts.get(size)
        if f is None:
            pg = _pg()
            if not pg.font.get_init():
                pg.font.init()
            f = self._fonts[size] = pg.font.Font(None, size)
        return f

    def _text(self, surf, text, pos, colour=None, size=18, anchor="topleft"):
        img = self._font(size).render(text, True, colour or PALETTE["ink"])
        rect = img.get_rect(**{anchor: (int(round(pos[0])), int(round(pos[1])))})
        surf.blit(img, rect)
        return rect

    def _text_in_view(self, surf, text, pos, colour=None, size=18, anchor="topleft"):
        """:meth:`_text`, moved inward as far as needed to show whole inside the view."""
        pg = _pg()
        img = self._font(size).render(text, True, colour or PALETTE["ink"])
        rect = img.get_rect(**{anchor: (int(round(pos[0])), int(round(pos[1])))})
        l, t, w, h = self.view.rect
        rect = rect.clamp(pg.Rect(l + 2, t + 2, w - 4, h - 4))
        surf.blit(img, rect)
        return rect

    def _body_to_screen(self, pose, pts):
        """Screen px, shape (m, 2), of body points ``pts`` (m, 2) m at world ``pose``."""
        pts = np.asarray(pts, dtype=float).reshape(-1, 2)
        c, s = math.cos(pose[2]), math.sin(pose[2])
        wx = pose[0] + c * pts[:, 0] - s * pts[:, 1]
        wy = pose[1] + s * pts[:, 0] + c * pts[:, 1]
        u, v = self.view.to_screen(wx, wy)
        return np.stack([u, v], axis=1)

    @staticmethod
    def _ipts(pts):
        """Integer pixel tuples of float pixel points, shape (m, 2)."""
        return [tuple(p) for p in np.rint(np.asarray(pts, dtype=float).reshape(-1, 2)).astype(int).tolist()]

    def _arrow(self, surf, colour, p0, p1, width=3, head=9):
        pg = _pg()
        d = np.subtract(p1, p0)
        n = float(np.hypot(*d))
        if n < 1.0:
            return
        e = d / n
        base = np.asarray(p1) - e * min(head, n)
        q = np.array([-e[1], e[0]])
        pg.draw.line(surf, colour, self._ipts([p0])[0], self._ipts([base])[0], width)
        pg.draw.polygon(surf, colour, self._ipts([p1, base + q * head * 0.55, base - q * head * 0.55]))

    # -- the frame ----------------------------------------------------------
    def draw(self, row, lines=(), notes=(), status=None):
        """Draw the frame for row k and return the surface (owned by the renderer).

        lines : extra (label, value) pairs for the panel.
        notes : extra warnings (drawn in vermillion) besides :func:`command_notes`.
        status : a :class:`Status` (playing / paused / finished, speed, checks) boxed in
        the top left corner of the view, or None.

        After drawing, ``texts`` lists what was written in the view as
        ``(text, rect, colour, background, size)`` (grid labels and the status box),
        and ``reserved`` the rects of the insets (scale bar, axes, status) that grid
        labels keep clear of.
        """
        pg = _pg()
        if self._surface is None:
            self._surface = pg.Surface(self.size, 0, 32)
        surf = self._surface
        pose = np.asarray(row.pose, dtype=float)
        if self.follow:
            self.view.center = pose[:2].copy()
        self.texts, self.reserved = [], []
        surf.fill(PALETTE["paper"])
        surf.set_clip(pg.Rect(self.view.rect))
        labels = self._grid(surf)
        meter = self.clearance()
        if meter is not None:
            self._swept(surf, meter.swept)
            self._floor(surf)
        touching = meter is not None and meter.touching
        self._route(surf)
        self._ghosts(surf)
        self._footprint(surf, pose, PALETTE["body_fill"], None, 2)
        self._path(surf)                    # over the fill: the path runs up to the body origin
        self._footprint(surf, pose, None, PALETTE["skid"] if touching else PALETTE["body_edge"],
                        4 if touching else 2)
        self._axles(surf, row)
        self._wheels(surf, row)
        self._centre(surf, pose)
        self._skids(surf, row)
        self._icr(surf, row)
        tgt = self.target(row.t)
        if tgt is not None:
            u, v = (float(c) for c in self.view.to_screen(tgt[0], tgt[1]))
            diamond = self._ipts([(u, v - 8), (u + 8, v), (u, v + 8), (u - 8, v)])
            pg.draw.polygon(surf, PALETTE["target"], diamond)
            pg.draw.polygon(surf, PALETTE["ink"], diamond, 2)
        lines, notes = list(lines), list(notes)
        if meter is not None:
            near, first = meter.nearest(), meter.first_contact()
            self._closest(surf, near, first)
            lines += self._clearance_lines(near)
            if first is not None:
                notes.append(f"contact with {first.feature} from t={first.t:.2f} s "
                             f"({meter.contact_rows} rows so far)" + ("; touching now" if touching else ""))
        self._scale_bar(surf)
        self._compass(surf)
        if status is not None:
            self._status(surf, status)
        self._grid_labels(surf, labels)     # last: on their own background, clear of the insets
        surf.set_clip(None)
        if self.route_xy is not None or self.waypoints is not None:
            lines = lines + [("route", "grey; waypoints: circles"),
                             ("", "target: yellow diamond" if self.plan is not None else "")]
        self._panel(surf, row, lines, notes)
        return surf

    def _route(self, surf):
        pg = _pg()
        if self.route_xy is not None and len(self.route_xy) >= 2:
            u, v = self.view.to_screen(self.route_xy[:, 0], self.route_xy[:, 1])
            pts = self._ipts(np.stack([u, v], axis=1))
            keep = [pts[0]] + [p for a, p in zip(pts, pts[1:]) if p != a]
            if len(keep) >= 2:
                pg.draw.lines(surf, PALETTE["route"], False, keep, 9)
        if self.waypoints is not None:
            u, v = self.view.to_screen(self.waypoints[:, 0], self.waypoints[:, 1])
            for p in self._ipts(np.stack([u, v], axis=1)):
                pg.draw.circle(surf, PALETTE["panel"], p, 6)
                pg.draw.circle(surf, PALETTE["ink"], p, 6, 2)

    # -- the floor ----------------------------------------------------------
    def _ring_pixels(self, ring):
        """Integer pixel tuples of a ring or line of world points (k, 2) m."""
        ring = np.asarray(ring, dtype=float)
        u, v = self.view.to_screen(ring[:, 0], ring[:, 1])
        return self._ipts(np.stack([u, v], axis=1))

    def _floor(self, surf):
        pg = _pg()
        lw = max(2, int(round(0.03 * self.view.scale)))
        for f in self.floor.features:
            if f.kind == "polygon":
                for rings in f.parts:
                    pg.draw.polygon(surf, PALETTE["floor_fill"], self._ring_pixels(rings[0]))
                    for hole in rings[1:]:
                        pg.draw.polygon(surf, PALETTE["paper"], self._ring_pixels(hole))
                    for ring in rings:
                        pg.draw.polygon(surf, PALETTE["floor_edge"], self._ring_pixels(ring), 2)
            else:
                for pts in f.parts:
                    pg.draw.lines(surf, PALETTE["floor_edge"], False, self._ring_pixels(pts), lw)

    def _swept(self, surf, geom):
        """The swept area, translucent: drawn on an alpha layer (exteriors filled, holes cleared)."""
        import shapely

        if geom is None or geom.is_empty:
            return
        pg = _pg()
        layer = pg.Surface(self.size, pg.SRCALPHA, 32)
        polys = sorted(shapely.get_parts(geom), key=lambda p: -p.area)   # islands after the holes around them
        for p in polys:
            if p.geom_type != "Polygon":
                continue
            ext = self._ring_pixels(np.asarray(p.exterior.coords))
            if len(ext) >= 3:
                pg.draw.polygon(layer, PALETTE["swept"], ext)
            for hole in p.interiors:
                pts = self._ring_pixels(np.asarray(hole.coords))
                if len(pts) >= 3:
                    pg.draw.polygon(layer, (0, 0, 0, 0), pts)
        surf.blit(layer, (0, 0))

    def _closest(self, surf, near, first):
        """The closest pair so far with its distance; the first contact in vermillion."""
        pg = _pg()
        if first is not None:
            p = self._ring_pixels([first.point])[0]
            for d in ((-9, -9, 9, 9), (-9, 9, 9, -9)):
                pg.draw.line(surf, PALETTE["skid"], (p[0] + d[0], p[1] + d[1]), (p[0] + d[2], p[1] + d[3]), 4)
            pg.draw.circle(surf, PALETTE["skid"], p, 13, 2)
        if near is None:
            return
        a, b = self._ring_pixels([near.base_point, near.feature_point])
        col = PALETTE["skid"] if near.distance <= 0 else PALETTE["closest"]
        pg.draw.line(surf, col, a, b, 2)
        for q in (a, b):
            pg.draw.circle(surf, PALETTE["panel"], q, 5)
            pg.draw.circle(surf, col, q, 5, 2)
        label = f"{near.distance * 1000:.0f} mm" if near.distance < 1 else f"{near.distance:.3f} m"
        d = np.subtract(b, a).astype(float)
        n = float(np.hypot(*d))
        off = np.array([-d[1], d[0]]) / n * 16 if n > 1 else np.array([0.0, -16.0])
        mid = (np.add(a, b) / 2 + off)
        img = self._font(18).render(label, True, col)
        rect = img.get_rect(center=(int(round(mid[0])), int(round(mid[1]))))
        pg.draw.rect(surf, PALETTE["panel"], rect.inflate(6, 2))
        surf.blit(img, rect)

    def _clearance_lines(self, near):
        if near is None:
            return [("clearance", "no floor features")]
        return [("clearance", f"{near.distance:.3f} m to {near.feature}"), ("", f"at t={near.t:.2f} s (least so far)")]

    def _grid(self, surf):
        """Grid lines; returns the labels of the major ones, ``[(pixel, value m, anchor)]``."""
        pg = _pg()
        v = self.view
        step = nice_step(40.0 / v.scale)
        m = step * (2 if round(step / 10.0 ** math.floor(math.log10(step))) == 5 else 5)
        l, t, w, h = v.rect
        x0, y1 = v.to_world(l, t)
        x1, y0 = v.to_world(l + w, t + h)
        labels = []
        for axis, lo, hi in ((0, x0, x1), (1, y0, y1)):
            k0, k1 = math.floor(lo / step), math.ceil(hi / step)
            for k in range(k0, k1 + 1):
                val = k * step
                major = abs(val / m - round(val / m)) < 1e-6
                col = PALETTE["grid_axis"] if k == 0 else PALETTE["grid_major"] if major else PALETTE["grid"]
                if axis == 0:
                    u = int(round(float(v.to_screen(val, 0)[0])))
                    pg.draw.line(surf, col, (u, t), (u, t + h - 1), 1)
                    if major:
                        labels.append(((u + 3, t + 4), val, "topleft"))
                else:
                    vv = int(round(float(v.to_screen(0, val)[1])))
                    pg.draw.line(surf, col, (l, vv), (l + w - 1, vv), 1)
                    if major:
                        labels.append(((l + w - 4, vv - 2), val, "bottomright"))
        return labels

    def _grid_labels(self, surf, labels):
        """The grid values, each whole inside the view, on a paper-coloured box (no line crosses
        it), clear of the insets and of each other; a label that cannot be placed so is left out."""
        pg = _pg()
        l, t, w, h = self.view.rect
        inner = pg.Rect(l + 2, t + 2, w - 4, h - 4)
        placed = []
        for pos, val, anchor in labels:
            txt = f"{round(val, 6) + 0.0:g} m"
            img = self._font(16).render(txt, True, PALETTE["muted"])
            rect = img.get_rect(**{anchor: (int(round(pos[0])), int(round(pos[1])))})
            box = rect.inflate(4, 2)
            if not inner.contains(box) or box.collidelist(self.reserved + placed) >= 0:
                continue
            pg.draw.rect(surf, PALETTE["paper"], box)
            surf.blit(img, rect)
            placed.append(box)
            self.texts.append((txt, rect, PALETTE["muted"], PALETTE["paper"], 16))

    def _compass(self, surf):
        """World axes, bottom right of the view."""
        pg = _pg()
        l, t, w, h = self.view.rect
        box = pg.Rect(l + w - 78, t + h - 78, 66, 66)
        pg.draw.rect(surf, PALETTE["panel"], box)
        self.reserved.append(box)
        o = (l + w - 64, t + h - 24)
        self._arrow(surf, PALETTE["muted"], o, (o[0] + 34, o[1]), 2, 7)
        self._arrow(surf, PALETTE["muted"], o, (o[0], o[1] - 34), 2, 7)
        self._text(surf, "x", (o[0] + 38, o[1]), PALETTE["muted"], 16, "midleft")
        self._text(surf, "y", (o[0], o[1] - 38), PALETTE["muted"], 16, "midbottom")

    def _status(self, surf, status):
        """The run's state, speed and (finished) each check's PASS / FAIL, boxed top left in the view."""
        pg = _pg()
        l, t, w, h = self.view.rect
        x0, y0 = l + 12, t + 26
        width = min(w - 120, 620)
        size = 18
        state_col = {"playing": PALETTE["path"], "paused": PALETTE["wheel_slip"],
                     "finished": PALETTE["body_edge"]}.get(status.state, PALETTE["ink"])
        rows = [((status.state, state_col), (f"speed x{status.speed:g}", PALETTE["ink"]))]
        checks = list(status.checks)
        shown = checks[:STATUS_CHECKS]
        for passed, text in shown:
            rows.append((("PASS", PALETTE["body_edge"]) if passed else ("FAIL", PALETTE["skid"]),
                         (text, PALETTE["ink"])))
        if len(checks) > len(shown):
            rows.append((("", PALETTE["ink"]), (f"... and {len(checks) - len(shown)} more "
                                                f"({sum(not p for p, _ in checks)} failed in all)", PALETTE["muted"])))
        if status.state == "finished" and not checks:
            rows.append((("", PALETTE["ink"]), ("no checks in this scenario", PALETTE["muted"])))
        f = self._font(size)
        width = min(width, 100 + max(f.size(b)[0] for (_, _), (b, _) in rows))     # no wider than its text
        box = pg.Rect(x0, y0, width, 10 + 22 * len(rows))
        pg.draw.rect(surf, PALETTE["panel"], box)
        pg.draw.rect(surf, state_col, box, 2)
        self.reserved.append(box)
        for i, ((a, ca), (b, cb)) in enumerate(rows):
            y = y0 + 6 + 22 * i
            for text, col, x, room in ((a, ca, x0 + 10, 74), (b, cb, x0 + 90, width - 100)):
                if not text:
                    continue
                if f.size(text)[0] > room:                  # shorten to fit the box, marked with "..."
                    while text and f.size(text + "...")[0] > room:
                        text = text[:-1]
                    text += "..."
                img = f.render(text, True, col)
                rect = img.get_rect(topleft=(x, y))
                surf.blit(img, rect)
                self.texts.append((text, rect, col, PALETTE["panel"], size))

    def _ghosts(self, surf):
        for g in self.ghosts:
            self._footprint(surf, g, None, PALETTE["ghost"], 1)

    def _path(self, surf):
        pg = _pg()
        if len(self.trail) >= 2:
            arr = np.asarray(self.trail)
            u, v = self.view.to_screen(arr[:, 0], arr[:, 1])
            pts = self._ipts(np.stack([u, v], axis=1))
            # drop repeated pixels so long trails stay cheap to draw
            keep = [pts[0]] + [p for a, p in zip(pts, pts[1:]) if p != a]
            if len(keep) >= 2:
                pg.draw.lines(surf, PALETTE["path"], False, keep, 3)

    def _footprint(self, surf, pose, fill, edge, width):
        """The footprint at ``pose``: ``fill`` and/or ``edge`` (outline and front chevron), either may be None."""
        pg = _pg()
        o = self.robot.outline
        L, W = (o[:, 0].max() - o[:, 0].min()) / 2, (o[:, 1].max() - o[:, 1].min()) / 2
        cx, cy = (o[:, 0].max() + o[:, 0].min()) / 2, (o[:, 1].max() + o[:, 1].min()) / 2
        pts = self._ipts(self._body_to_screen(pose, o))
        if fill is not None:
            pg.draw.polygon(surf, fill, pts)
        if edge is None:
            return
        pg.draw.polygon(surf, edge, pts, width)
        # front chevron
        c = self._ipts(self._body_to_screen(pose, [(cx + L - 0.35 * W, cy + 0.5 * W), (cx + L - 0.05 * W, cy),
                                                   (cx + L - 0.35 * W, cy - 0.5 * W)]))
        pg.draw.lines(surf, edge, False, c, width)

    def _axles(self, surf, row):
        pg = _pg()
        a = self.robot.arrays
        pose = row.pose
        for i in np.flatnonzero(a.is_("fixed", "steered")):
            h = float(row.steer[i])
            p, q = self._body_to_screen(pose, [(a.x[i], a.y[i]), (a.x[i] - math.sin(h), a.y[i] + math.cos(h))])
            seg = self.view.clip_line(p, q - p)
            if seg is not None:
                pg.draw.line(surf, PALETTE["axle"], *self._ipts(seg), 2)

    def _wheels(self, surf, row):
        pg = _pg()
        pose = row.pose
        skid = np.hypot(*wheel_skid(self.robot, row).T)
        for i, w in enumerate(self.robot.wheels):
            h = float(row.steer[i])
            c, s = math.cos(h), math.sin(h)
            if w.type == "castor":
                cx, cy = w.x - w.trail * c, w.y - w.trail * s
            else:
                cx, cy = w.x, w.y
            if w.type == "ball":
                ctr = self._ipts(self._body_to_screen(pose, [(cx, cy)]))[0]
                # grey disc, at least BALL_MIN_PX across the radius so it never reads as the black origin dot
                rad = max(int(round(w.radius * self.view.scale)), BALL_MIN_PX)
                pg.draw.circle(surf, PALETTE["ball"], ctr, rad)
                pg.draw.circle(surf, PALETTE["ink"], ctr, rad, 1)
                continue
            r = w.radius
            half_w = max(0.22 * r, 0.010, 2.5 / self.view.scale)
            corners = [(cx + c * r - s * half_w, cy + s * r + c * half_w),
                       (cx - c * r - s * half_w, cy - s * r + c * half_w),
                       (cx - c * r + s * half_w, cy - s * r - c * half_w),
                       (cx + c * r + s * half_w, cy + s * r - c * half_w)]
            pts = self._ipts(self._body_to_screen(pose, corners))
            fill = slip_colour(skid[i]) if w.standard or w.driven else PALETTE["wheel_clean"]
            pg.draw.polygon(surf, fill, pts)
            pg.draw.polygon(surf, PALETTE["ink"], pts, 1)
            if w.type == "swedish":
                g = h + w.roller
                cg, sg = math.cos(g), math.sin(g)
                ln = 0.9 * half_w / max(abs(math.cos(w.roller)), 0.3)
                for f in (-0.6, -0.2, 0.2, 0.6):
                    mx, my = cx + c * r * f, cy + s * r * f
                    seg = self._body_to_screen(pose, [(mx - cg * ln, my - sg * ln), (mx + cg * ln, my + sg * ln)])
                    pg.draw.line(surf, PALETTE["roller"], *self._ipts(seg), 2)
            if w.type in ("castor", "steered"):
                axis = self._ipts(self._body_to_screen(pose, [(w.x, w.y), (cx, cy)]))
                if w.type == "castor":
                    pg.draw.line(surf, PALETTE["ink"], axis[0], axis[1], 3)
                pg.draw.circle(surf, PALETTE["panel"], axis[0], 4)
                pg.draw.circle(surf, PALETTE["ink"], axis[0], 4, 2)

    def _centre(self, surf, pose):
        pg = _pg()
        L = self.robot.length / 2
        p0, p1 = self._body_to_screen(pose, [(0.0, 0.0), (0.55 * L, 0.0)])
        self._arrow(surf, PALETTE["body_edge"], p0, p1, 3, 10)
        pg.draw.circle(surf, PALETTE["ink"], self._ipts([p0])[0], 5)

    def _skids(self, surf, row):
        pg = _pg()
        v = wheel_skid(self.robot, row)
        th = float(row.pose[2])
        c, s = math.cos(th), math.sin(th)
        for i, w in enumerate(self.robot.wheels):
            sp = float(np.hypot(*v[i]))
            n = sp * ARROW_SCALE
            if n < 3.0:
                continue
            h = float(row.steer[i])
            cx, cy = (w.x - w.trail * math.cos(h), w.y - w.trail * math.sin(h)) if w.type == "castor" else (w.x, w.y)
            p0 = self._body_to_screen(row.pose, [(cx, cy)])[0]
            d = np.array([c * v[i, 0] - s * v[i, 1], -(s * v[i, 0] + c * v[i, 1])]) / sp
            p1 = p0 + d * min(n, ARROW_MAX)
            self._arrow(surf, PALETTE["skid"], p0, p1, 3, 10)
            if n > ARROW_MAX:
                q = np.array([-d[1], d[0]]) * 7
                m = p0 + d * (ARROW_MAX - 14)
                pg.draw.line(surf, PALETTE["skid"], *self._ipts([m - q, m + q]), 3)

    def icr_pixel(self, row):
        """Screen px (u, v) of the row's ICR, or None when there is none (translation, rest)."""
        icr = np.asarray(row.icr, dtype=float)
        if not np.all(np.isfinite(icr)):
            return None
        u, v = self.view.to_screen(icr[0], icr[1])
        return (float(u), float(v))

    def _icr(self, surf, row):
        pg = _pg()
        col = PALETTE["icr"]
        px = self.icr_pixel(row)
        if px is not None:
            if self.view.inside(px[0], px[1], 8):
                p = self._ipts([px])[0]
                pg.draw.circle(surf, PALETTE["panel"], p, 13)
                pg.draw.circle(surf, col, p, 12, 4)
                pg.draw.circle(surf, col, p, 4)
                pg.draw.circle(surf, PALETTE["ink"], p, 13, 1)
                self._text_in_view(surf, "ICR", (p[0] + 16, p[1] - 14), PALETTE["ink"], 18, "topleft")
            else:
                e = np.array(self.view.edge_point(px))
                d = np.subtract(px, e)
                d = d / max(float(np.hypot(*d)), 1e-12)
                q = np.array([-d[1], d[0]])
                tip = e + d * 16
                tri = self._ipts([tip, e - d * 8 + q * 11, e - d * 8 - q * 11])
                pg.draw.polygon(surf, col, tri)
                pg.draw.polygon(surf, PALETTE["ink"], tri, 1)
                dist = math.hypot(row.icr[0] - row.pose[0], row.icr[1] - row.pose[1])
                lab = e - d * 22
                self._text_in_view(surf, f"ICR {dist:.3g} m", lab, PALETTE["ink"], 18, "center")
            return
        tw = np.asarray(row.twist, dtype=float)
        speed = math.hypot(tw[0], tw[1])
        if speed <= _SPEED_EPS:
            return
        # pure translation: a hollow double arrow along the motion, from the centre
        th = float(row.pose[2])
        dx = (math.cos(th) * tw[0] - math.sin(th) * tw[1]) / speed
        dy = (math.sin(th) * tw[0] + math.cos(th) * tw[1]) / speed
        p0 = np.array(self.view.to_screen(row.pose[0], row.pose[1]), dtype=float)
        d = np.array([dx, -dy])
        q = np.array([-d[1], d[0]])
        start = p0 + d * (self._reach * self.view.scale + 10)
        self._double_arrow(surf, col, start, d, q)
        self._text_in_view(surf, "ICR at infinity", start + d * 64 + q * 16, PALETTE["ink"], 18, "center")

    def _double_arrow(self, surf, col, start, d, q):
        pg = _pg()
        for off in (-4.0, 4.0):
            a, b = start + q * off, start + d * 40 + q * off
            pg.draw.line(surf, col, *self._ipts([a, b]), 3)
        tip = start + d * 56
        pg.draw.polygon(surf, col, self._ipts([tip, start + d * 40 + q * 11, start + d * 40 - q * 11]), 3)

    def _scale_bar(self, surf):
        pg = _pg()
        l, t, w, h = self.view.rect
        length = nice_step(110.0 / self.view.scale)
        px = int(round(length * self.view.scale))
        x0, y0 = l + 22, t + h - 22
        box = pg.Rect(x0 - 8, y0 - 28, px + 16, 38)
        pg.draw.rect(surf, PALETTE["panel"], box)
        self.reserved.append(box)
        pg.draw.line(surf, PALETTE["ink"], (x0, y0), (x0 + px, y0), 3)
        for xx in (x0, x0 + px):
            pg.draw.line(surf, PALETTE["ink"], (xx, y0 - 6), (xx, y0 + 4), 2)
        txt = f"{length:g} m" if length >= 0.01 else f"{length * 1000:g} mm"
        self._text(surf, txt, (x0 + px / 2, y0 - 5), PALETTE["ink"], 18, "midbottom")

    # -- side panel ---------------------------------------------------------
    def _wrap(self, text, width, size):
        f = self._font(size)
        out, cur = [], ""
        for word in text.split():
            cand = word if not cur else cur + " " + word
            if f.size(cand)[0] <= width or not cur:
                cur = cand
            else:
                out.append(cur)
                cur = word
        if cur:
            out.append(cur)
        return out

    def _panel(self, surf, row, extra, notes):
        pg = _pg()
        W, H = PANEL_W, self.size[1]
        pg.draw.rect(surf, PALETTE["panel"], pg.Rect(0, 0, W, H))
        pg.draw.line(surf, PALETTE["panel_edge"], (W - 1, 0), (W - 1, H), 2)
        x, y = 16, 12
        self._text(surf, self.robot.name, (x, y), PALETTE["ink"], 28)
        y += 26
        sub = self.title + (f"   step {self.step:g} s" if self.step else "")
        self._text(surf, sub, (x, y), PALETTE["muted"], 17)
        y += 24
        an = self.analysis
        tw = row.twist
        px, py, th = row.pose
        if row.cmd_twist is None:
            cmd = "wheel spins" if np.any(np.nan_to_num(row.spin_cmd) != 0) else "none (stopped)"
            cmd2 = None
        else:
            cx_, cy_, cw_ = row.cmd_twist
            cmd, cmd2 = f"vx {fixed(cx_, 3)}  vy {fixed(cy_, 3)} m/s", f"omega {fixed(cw_, 4)} rad/s"
        icr = np.asarray(row.icr, dtype=float)
        if np.all(np.isfinite(icr)):
            r = math.hypot(icr[0] - px, icr[1] - py)
            icr1, icr2 = f"({fixed(icr[0], 3)}, {fixed(icr[1], 3)}) m", f"{r:.3f} m from the centre"
        elif math.hypot(tw[0], tw[1]) > _SPEED_EPS:
            icr1, icr2 = "at infinity", "pure translation"
        else:
            icr1, icr2 = "none", "at rest"
        skid = np.hypot(*wheel_skid(self.robot, row).T)
        worst = int(np.argmax(skid)) if len(skid) else 0
        rows = [("t", f"{row.t:.3f} s"),
                ("pose", f"x {fixed(px, 3)}  y {fixed(py, 3)} m"),
                ("", f"heading {fixed(math.degrees(th), 2)} deg"),
                ("twist", f"vx {fixed(tw[0], 3)}  vy {fixed(tw[1], 3)} m/s"),
                ("", f"omega {fixed(tw[2], 4)} rad/s"),
                ("command", cmd)]
        if cmd2:
            rows.append(("", cmd2))
        rows += [("ICR", icr1), ("", icr2),
                 ("slip now", f"{row.slip:.4f} m/s"),
                 ("", f"most: {self.robot.wheels[worst].name} {skid[worst]:.4f}"
                  if len(skid) and skid[worst] > 1e-6 else "no wheel skids"),
                 ("slip peak", f"{self.peak[0]:.4f} m/s at {self.peak[1]:.2f} s"),
                 ("policy", f"align {self.align}"),
                 ("degrees", f"mobility {an.mobility}, steerability {an.steerability}"),
                 ("", f"maneuverability {an.maneuverability}"),
                 ("", an.kind)]
        rows += list(extra)
        for label, value in rows:
            if label:
                self._text(surf, label, (x, y), PALETTE["muted"], 18)
            self._text(surf, value, (x + 88, y), PALETTE["ink"], 18)
            y += 19
        y += 4
        legend_top = H - 178 - (66 if self.floor is not None else 0)
        for note in command_notes(self.robot, row, self.align, self.align_tolerance) + notes:
            for ln in self._wrap(note, W - 2 * x, 18):
                if y + 18 > legend_top - 10:        # no room left: the legend stays readable
                    break
                self._text(surf, ln, (x, y), PALETTE["skid"], 18)
                y += 18
        self._legend(surf, x, legend_top)

    def _legend(self, surf, x, y):
        pg = _pg()
        pg.draw.line(surf, PALETTE["panel_edge"], (x, y - 8), (PANEL_W - 16, y - 8), 1)
        self._text(surf, "legend", (x, y - 4), PALETTE["muted"], 17)
        y += 14
        tx = x + 72
        # wheel colour ramp
        for k in range(8):
            pg.draw.rect(surf, slip_colour(SLIP_FULL * k / 7), pg.Rect(x + k * 7, y + 4, 7, 12))
        pg.draw.rect(surf, PALETTE["ink"], pg.Rect(x, y + 4, 56, 12), 1)
        self._text(surf, f"wheel skid 0 to {SLIP_FULL:g} m/s", (tx, y + 2), PALETTE["ink"], 17)
        y += 22
        ref = nice_step(56.0 / ARROW_SCALE)
        ref = ref / 2 if ref * ARROW_SCALE > 56 else ref
        self._arrow(surf, PALETTE["skid"], (x, y + 9), (x + ref * ARROW_SCALE, y + 9), 3, 9)
        self._text(surf, f"skid velocity; arrow = {ref:g} m/s", (tx, y + 2), PALETTE["ink"], 17)
        y += 22
        pg.draw.line(surf, PALETTE["axle"], (x, y + 9), (x + 56, y + 9), 2)
        self._text(surf, "axle line (no sideways motion)", (tx, y + 2), PALETTE["ink"], 17)
        y += 22
        c = (x + 14, y + 9)
        pg.draw.circle(surf, PALETTE["icr"], c, 8, 3)
        pg.draw.circle(surf, PALETTE["icr"], c, 3)
        tri = [(x + 46, y + 9), (x + 34, y + 1), (x + 34, y + 17)]
        pg.draw.polygon(surf, PALETTE["icr"], tri)
        self._text(surf, "ICR; triangle: off the view", (tx, y + 2), PALETTE["ink"], 17)
        y += 22
        self._double_arrow(surf, PALETTE["icr"], np.array([x + 2.0, y + 9.0]), np.array([0.9, 0.0]),
                           np.array([0.0, 0.9]))
        self._text(surf, "ICR at infinity (translation)", (tx, y + 2), PALETTE["ink"], 17)
        y += 22
        pg.draw.line(surf, PALETTE["path"], (x, y + 9), (x + 56, y + 9), 3)
        self._text(surf, "path; pale outlines: earlier", (tx, y + 2), PALETTE["ink"], 17)
        if self.floor is None:
            return
        y += 22
        pg.draw.rect(surf, PALETTE["floor_fill"], pg.Rect(x, y + 3, 24, 13))
        pg.draw.rect(surf, PALETTE["floor_edge"], pg.Rect(x, y + 3, 24, 13), 2)
        pg.draw.line(surf, PALETTE["floor_edge"], (x + 32, y + 9), (x + 56, y + 9), 3)
        self._text(surf, "floor: solid feature, wall line", (tx, y + 2), PALETTE["ink"], 17)
        y += 22
        layer = pg.Surface((56, 13), pg.SRCALPHA, 32)
        layer.fill(PALETTE["swept"])
        surf.blit(layer, (x, y + 3))
        self._text(surf, "area swept so far", (tx, y + 2), PALETTE["ink"], 17)
        y += 22
        for q in ((x + 5, y + 9), (x + 38, y + 9)):
            pg.draw.circle(surf, PALETTE["closest"], q, 4, 2)
        pg.draw.line(surf, PALETTE["closest"], (x + 9, y + 9), (x + 34, y + 9), 2)
        for d in ((-5, -5, 5, 5), (-5, 5, 5, -5)):
            pg.draw.line(surf, PALETTE["skid"], (x + 52 + d[0], y + 9 + d[1]), (x + 52 + d[2], y + 9 + d[3]), 3)
        self._text(surf, "closest pair; x: first contact", (tx, y + 2), PALETTE["ink"], 17)


# --------------------------------------------------------------------------
# pixels out


def to_array(surface) -> np.ndarray:
    """The surface's pixels, shape (height, width, 3) uint8 RGB."""
    pg = _pg()
    w, h = surface.get_size()
    return np.frombuffer(pg.image.tobytes(surface, "RGB"), dtype=np.uint8).reshape(h, w, 3).copy()


def save_png(surface, path) -> None:
    """Write ``surface`` as a PNG at ``path``, whole or not at all (:mod:`sim.files.atomic`)."""
    import io

    from sim.files.atomic import write_bytes
    pg = _pg()
    buf = io.BytesIO()
    pg.image.save(surface, buf, "frame.png")
    write_bytes(path, buf.getvalue(), "the PNG")


# --------------------------------------------------------------------------
# the window


_KEY_ALIASES = {"=": "+", "keypad +": "+", "[+]": "+", "]": "+", "keypad -": "-", "[-]": "-", "[": "-"}


class Window:
    """A pygame window that shows renderer frames and turns input into plain events.

    :meth:`events` returns tuples: ``("key", name)`` with pygame's key name
    (``"up"``, ``"w"``, ``"space"``, ``"escape"``; ``=``, ``]`` and keypad plus
    read ``"+"``, ``[`` and keypad minus ``"-"``), ``("keyup", name)`` when it
    is released, ``("unfocus",)`` when the window loses the keyboard, ``("quit",)``,
    ``("zoom", factor, (u, v))`` and ``("pan", du, dv)`` (px).
    ``hidden=True`` opens no visible window (tests, with the dummy driver).
    """

    def __init__(self, size=DEFAULT_SIZE, title="trundle", hidden=False, joystick=True, key_repeat=None):
        from sim.errors import InputError

        pg = _pg()
        try:
            pg.display.init()
            driver = pg.display.get_driver()
            if not hidden and driver in ("dummy", "offscreen"):
                raise InputError("window", None, f"no display to open a window on (SDL video driver "
                                 f"'{driver}'); trundle run --png and --frames need none")
            pg.font.init()
            flags = pg.HIDDEN if hidden else 0
            self.screen = pg.display.set_mode((int(size[0]), int(size[1])), flags)
        except pg.error as exc:
            pg.display.quit()
            raise InputError("window", None, f"cannot open a window: {exc}") from None
        except InputError:
            pg.display.quit()
            raise
        pg.display.set_caption(title)
        if key_repeat:
            pg.key.set_repeat(*key_repeat)
        self._clock = pg.time.Clock()
        self.hidden = hidden
        self._drag = False
        self.stick = None
        if joystick:
            pg.joystick.init()
            if pg.joystick.get_count():
                self.stick = pg.joystick.Joystick(0)
        self.help = None

    def set_title(self, text: str) -> None:
        _pg().display.set_caption(text)

    def events(self) -> list:
        pg = _pg()
        out = []
        for ev in pg.event.get():
            if ev.type == pg.QUIT:
                out.append(("quit",))
            elif ev.type == pg.KEYDOWN:
                name = pg.key.name(ev.key)
                out.append(("key", _KEY_ALIASES.get(name, name)))
            elif ev.type == pg.KEYUP:
                name = pg.key.name(ev.key)
                out.append(("keyup", _KEY_ALIASES.get(name, name)))
            elif ev.type == getattr(pg, "WINDOWFOCUSLOST", None):
                out.append(("unfocus",))
            elif ev.type == pg.MOUSEWHEEL:
                out.append(("zoom", 1.2 ** ev.y, pg.mouse.get_pos()))
            elif ev.type == pg.MOUSEBUTTONDOWN and ev.button == 1:
                self._drag = True
            elif ev.type == pg.MOUSEBUTTONUP and ev.button == 1:
                self._drag = False
            elif ev.type == pg.MOUSEMOTION and self._drag:
                out.append(("pan", ev.rel[0], ev.rel[1]))
            elif ev.type == pg.JOYDEVICEADDED and self.stick is None:
                self.stick = pg.joystick.Joystick(ev.device_index)
            elif ev.type == pg.JOYDEVICEREMOVED and self.stick is not None:
                if getattr(ev, "instance_id", None) == self.stick.get_instance_id():
                    self.stick = None
        return out

    def sticks(self):
        """Axis values (-1..1) of the first gamepad, or None when there is none."""
        if self.stick is None:
            return None
        return [self.stick.get_axis(i) for i in range(self.stick.get_numaxes())]

    def buttons(self):
        """Pressed state (bool) of each button of the first gamepad, or None when there is none."""
        if self.stick is None:
            return None
        return [bool(self.stick.get_button(i)) for i in range(self.stick.get_numbuttons())]

    def keys_down(self, names):
        """Which of the key ``names`` the keyboard reports held now (a set), or None for a
        hidden window (tests post their own events, which the keyboard state does not see)."""
        if self.hidden:
            return None
        pg = _pg()
        pressed = pg.key.get_pressed()
        return {n for n in names if pressed[pg.key.key_code(n)]}

    def show(self, surface, help_lines=None) -> None:
        """Copy ``surface`` to the screen and flip; ``help_lines``: (key, meaning) pairs boxed on top."""
        pg = _pg()
        self.screen.blit(surface, (0, 0))
        if help_lines:
            font = pg.font.Font(None, 20)
            kw = max(font.size(k)[0] for k, _ in help_lines) + 16
            w = kw + max(font.size(t)[0] for _, t in help_lines) + 28
            h = 22 * len(help_lines) + 20
            x0 = PANEL_W + 20
            pg.draw.rect(self.screen, PALETTE["panel"], pg.Rect(x0, 20, w, h))
            pg.draw.rect(self.screen, PALETTE["ink"], pg.Rect(x0, 20, w, h), 2)
            for i, (k, t) in enumerate(help_lines):
                self.screen.blit(font.render(k, True, PALETTE["body_edge"]), (x0 + 14, 30 + 22 * i))
                self.screen.blit(font.render(t, True, PALETTE["ink"]), (x0 + 14 + kw, 30 + 22 * i))
        pg.display.flip()

    def tick(self, fps: float = 60.0) -> float:
        """Wait so that frames come at most ``fps`` a second; returns the seconds since the last tick."""
        return self._clock.tick(fps) / 1000.0

    def pixels(self) -> np.ndarray:
        """What the screen shows, shape (height, width, 3) uint8."""
        return to_array(self.screen)

    def close(self) -> None:
        _pg().display.quit()
