"""Watching and picturing a scenario run: ``trundle run --window / --png / --frames``.

The run itself is :func:`sim.runner.run_scenario`; this module hangs a
:class:`~sim.render.Renderer` on its ``on_row`` callback.  No pygame here:
all drawing and windowing is in :mod:`sim.render`.

The view is fitted to the whole path, so every mode starts from the same
picture: with ``--png`` alone the fit is made after the run, with ``--window``
or ``--frames`` a first, silent pass finds the path's extent.  A window and a
PNG of the same state therefore have the same pixels.

Window keys: space pause / resume, n single step (pauses), + or ] faster,
- or [ slower, r restart, f follow the base, c fit the view, h help,
Escape or q quit (mid-run this interrupts the run, exit 130).  Mouse wheel
zooms, dragging pans.
"""
from __future__ import annotations

import os
import time

from sim.errors import InputError
from sim.runs.runner import run_scenario

HELP = (("space", "pause / resume"), ("n", "single step"), ("+  ]", "faster"), ("-  [", "slower"),
        ("r", "restart"), ("f", "follow the base"), ("c", "fit the view"), ("h", "this help"),
        ("esc  q", "quit"), ("wheel", "zoom; drag: pan"))
FRAME_NAME = "frame-{:06d}.png"


class _Restart(Exception):
    """Raised from the row callback to start the run again."""


def _check_out_dir(path, what):
    """InputError unless the directory that would hold ``path`` exists."""
    d = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(d):
        raise InputError(what, None, f"directory '{os.path.dirname(path) or '.'}' does not exist")


def at_step(scen, at: float) -> int:
    """Row index of the step nearest ``at`` s; InputError unless 0 <= at <= the duration."""
    if not (at >= 0 and at <= scen.duration + 1e-9 * scen.step):
        raise InputError("--at", None, f"must be a time from 0 to the end of the run ({scen.duration:g} s), "
                         f"got {at:g}")
    return min(int(round(at / scen.step)), scen.steps - 1)


def view_run(scen, csv=None, every=1, window=False, png=None, frames=None, fps=30.0,
             size=None, hidden=False, at=None):
    """Run ``scen`` and show or picture it; returns the :class:`~sim.runner.RunResult`.

    window : bool, play in a window in real time (blocks until the user quits).
    png : path or None, write the final frame there (or the frame at ``at``).
    frames : directory or None, write ``frame-000000.png`` ... every ``1/fps`` s of run time.
    size : (width, height) px or None for :data:`sim.render.DEFAULT_SIZE`.
    hidden : open the window hidden (tests).
    at : s or None: the PNG shows the step nearest this time (trail, peak slip up to
    then; the view still fitted to the whole path), not the final one.
    """
    from sim.view import render

    if at is not None and not png:
        raise InputError("--at", None, "needs --png PATH (the picture of the run at that time)")
    k_at = at_step(scen, at) if at is not None else None
    if png:
        _check_out_dir(png, "--png")
    if frames:
        if not fps > 0:
            raise InputError("--fps", None, f"must be > 0 frames per second, got {fps:g}")
        if os.path.exists(frames) and not os.path.isdir(frames):
            raise InputError("--frames", None, f"'{frames}' exists and is not a directory")
        try:
            os.makedirs(frames, exist_ok=True)
        except OSError as exc:
            raise InputError("--frames", None, f"cannot create directory '{frames}': {exc.strerror}") from None
    if not window:
        render.use_headless()
    size = size or render.DEFAULT_SIZE
    name = os.path.basename(scen.source)
    rd = render.Renderer(scen.robot, size, name, align=scen.align, step=scen.step,
                         align_tolerance=scen.align_tolerance, floor=scen.floor)
    if scen.plan is not None:
        rd.set_route(scen.plan.path.xy, scen.route.waypoints, scen.plan)
    elif any(c.kind == "goto" for c in scen.script):
        rd.set_route(None, [c.value[:2] for c in scen.script if c.kind == "goto"])
    win = None
    try:
        full = None
        if window or frames:
            pre = run_scenario(scen, on_row=rd.observe)
            if pre.interrupted:
                return pre
            full = rd.bounds
            rd.fit(full)
            rd.reset()
        if window:
            win = render.Window(size, f"trundle  {name}", hidden=hidden, joystick=False)
        player = _Player(rd, win, frames, fps, scen.step, full, k_at)
        while True:
            try:
                res = run_scenario(scen, csv=csv, every=every, on_row=player.on_row)
            except _Restart:
                rd.reset()
                player.restart()
                continue
            if full is None:
                full = player.full = rd.bounds
                rd.fit(full)
            if png and player.at_row is not None:          # --at: the state then, drawn in the final view
                end = rd.snapshot()
                rd.restore(player.at_state)
                render.save_png(rd.draw(player.at_row), png)
                rd.restore(end)
            elif png and player.last is not None:
                render.save_png(rd.draw(player.last), png)
            if win is None or res.interrupted:
                return res
            try:
                player.linger(res)
            except _Restart:
                rd.reset()
                player.restart()
                continue
            return res
    finally:
        if win is not None:
            win.close()


class _Player:
    """The row callback: trail, frames, and (with a window) real-time pacing and keys."""

    def __init__(self, rd, win, frames, fps, step, full, k_at=None):
        self.rd, self.win, self.frames, self.fps, self.dt = rd, win, frames, fps, step
        self.full = full            # bounds (m) of the whole path, for "fit the view"
        self.k_at = k_at            # row index whose picture --png --at wants
        self.speed = 1.0
        self.paused = False
        self.single = False
        self.help = False
        self.restart()

    def restart(self):
        self.last = None
        self.rows = 0
        self.at_row = self.at_state = None
        self.frame_no = 0
        self.anchor = None          # (wall time, run time) of the pacing reference
        self.drawn_at = -1.0        # wall time of the last window frame

    # -- per row --------------------------------------------------------------
    def on_row(self, row):
        from sim.view import render

        self.rd.observe(row)
        self.last = row
        if self.rows == self.k_at:
            self.at_row, self.at_state = row, self.rd.snapshot()
        self.rows += 1
        if self.frames:
            while row.t >= self.frame_no / self.fps - 1e-9 * self.dt:
                path = os.path.join(self.frames, FRAME_NAME.format(self.frame_no))
                render.save_png(self.rd.draw(row), path)
                self.frame_no += 1
        if self.win is not None:
            self._pace(row)

    def _pace(self, row):
        self._keys()
        if self.paused:
            self._show(row)
            while self.paused and not self.single:
                time.sleep(0.02)
                self._keys()
                self._show(row)
            self.single = False
            self.anchor = None
            return
        now = time.monotonic()
        if self.anchor is None or now - (self.anchor[0] + (row.t - self.anchor[1]) / self.speed) > 0.25:
            self.anchor = (now, row.t)       # start, resume, or fallen behind: re-anchor
        if now - self.drawn_at >= 1 / 60:
            self._show(row)
            self.drawn_at = now
        wait = self.anchor[0] + (row.t - self.anchor[1]) / self.speed - time.monotonic()
        if wait > 0.002:
            time.sleep(wait)

    def linger(self, res):
        """After the run: keep showing the last frame, with each check's PASS / FAIL, until
        the user quits or restarts."""
        self.paused = False
        checks = [(c.passed, c.text) for c in res.checks]
        while True:
            if self._keys(finished=True):
                return
            self._show(self.last, "finished", checks)
            time.sleep(0.03)

    # -- window ---------------------------------------------------------------
    def _title(self, state):
        speed = f"x{self.speed:g}"
        self.win.set_title(f"trundle  {self.rd.title}  {state}  {speed}  (h: help)")

    def _show(self, row, state=None, checks=()):
        """Draw ``row`` in the window with the state, speed (and checks) in the picture and the title."""
        from sim.view.render import Status

        state = state or ("paused" if self.paused else "playing")
        self._title(state)
        self.win.show(self.rd.draw(row, status=Status(state, self.speed, checks)), HELP if self.help else None)

    def _keys(self, finished=False):
        """Handle input; True when the user quits after the run has finished."""
        for ev in self.win.events():
            kind = ev[0]
            if kind == "quit" or (kind == "key" and ev[1] in ("escape", "q")):
                if finished:
                    return True
                raise KeyboardInterrupt
            if kind == "zoom":
                self.rd.view.zoom(ev[1], ev[2])
            elif kind == "pan":
                self.rd.follow = False
                self.rd.view.pan(ev[1], ev[2])
            elif kind == "key":
                k = ev[1]
                if k == "space":
                    self.paused = not self.paused
                    self.anchor = None
                elif k == "n":
                    self.paused, self.single = True, True
                elif k == "+":
                    self.speed = min(self.speed * 2, 64.0)
                    self.anchor = None
                elif k == "-":
                    self.speed = max(self.speed / 2, 1 / 16)
                    self.anchor = None
                elif k == "r":
                    raise _Restart
                elif k == "f":
                    self.rd.follow = not self.rd.follow
                elif k == "c":
                    self.rd.follow = False
                    self.rd.fit(self.full)
                elif k == "h":
                    self.help = not self.help
        return False
