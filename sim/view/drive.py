"""A hand-driving session: window input -> teleop request -> engine -> picture (and recording).

Each frame: read the window's events (keys down and up via
:func:`sim.view.teleop.key_down` / :func:`~sim.view.teleop.key_up`, the gamepad via
:func:`~sim.view.teleop.pad`), command the body twist
(:func:`~sim.view.teleop.body_twist`) through :meth:`sim.engine.simulator.Simulator.command_twist`
(so the inverse kinematics and the base's limits apply), advance the engine
by as many fixed steps as wall-clock time has passed, record, draw.  Hold to
drive: with nothing held the request is zero and the base ramps to a stop; a
window that loses the keyboard lets go of every key.  No pygame here: the
window and drawing are :mod:`sim.view.render`.
"""
from __future__ import annotations

import os
import time

from sim.engine.simulator import Simulator
from sim.view.teleop import (DRIVE_KEYS, LEVELS, TeleopConfig, TeleopState, body_twist, keep_held, key_down,
                             key_up, pad, release_all, request)

MAX_CATCH_UP = 0.25   # s of run time advanced at most per frame (a slow frame does not jump)
FOLLOW_KEY, HELP_KEY = "tab", "f1"
HELP = (("hold f / v", "drive forward / backward"), ("hold d / g", "turn left / right"),
        ("hold s / h", "slide left / right (bases that can)"), ("let go", "the base ramps to a stop"),
        ("1 2 3 4 5", "speed level: 10 25 50 75 100 % of the caps"),
        ("pad", "sticks drive while a shoulder button is held"), ("b", "body / world frame"),
        ("p", "steering policy"), ("tab", "follow the base"), ("f1", "this help"), ("esc", "quit"),
        ("wheel", "zoom; drag: pan"))


def _fmt(v, nd=3):
    s = f"{v:.{nd}f}"
    return s[1:] if s.startswith("-") and float(s) == 0.0 else s


class DriveSession:
    """Drive ``robot`` by hand.

    Parameters
    ----------
    robot : Robot.  robot_path : its file (for the replay scenario).
    step : s, the engine's fixed step.
    record : trace CSV path or None (see :mod:`sim.recording`).
    align : starting steering policy.
    size : (width, height) px of the window.
    hidden : open the window hidden (tests, with the dummy video driver).
    joystick : look for a gamepad.  deadband : its sticks' dead band (0..1).
    enable_buttons : gamepad buttons, any one of which enables the sticks while held.
    level : starting speed level, 1..5.
    """

    def __init__(self, robot, robot_path=None, step=0.01, record=None, align="wait", size=None,
                 hidden=False, joystick=True, deadband=0.15, enable_buttons=None, level=2):
        from sim.view import render
        from sim.view.teleop import ENABLE_BUTTONS

        self.robot = robot
        self.sim = Simulator(robot, step, align=align)
        self.cfg = TeleopConfig.for_robot(robot, deadband, enable_buttons or ENABLE_BUTTONS)
        self.state = TeleopState(align=align, level=level)
        self.recorder = None
        if record:
            from sim.view.recording import Recorder
            self.recorder = Recorder(record, robot, robot_path or robot.source, step, align)
        size = size or render.DEFAULT_SIZE
        self.renderer = render.Renderer(robot, size, "drive", align=align, step=step)
        self.renderer.follow = True
        self.renderer.fit((0.0, 0.0, 0.0, 0.0))
        self.renderer.view.zoom(0.5)
        try:
            self.window = render.Window(size, f"trundle drive  {robot.name}  (F1: keys)", hidden=hidden,
                                        joystick=joystick)
        except BaseException:
            if self.recorder:
                self.recorder.abort()
            raise
        self.row = None
        self.closed = False
        self.help = False

    # -- one frame ------------------------------------------------------------
    def handle_events(self) -> None:
        """Read keys, mouse and gamepad into the request and the view."""
        for ev in self.window.events():
            kind = ev[0]
            if kind == "quit":
                self.state = key_down(self.state, "escape")
            elif kind == "key":
                k = ev[1]
                if k == FOLLOW_KEY:
                    self.renderer.follow = not self.renderer.follow
                elif k == HELP_KEY:
                    self.help = not self.help
                else:
                    self.state = key_down(self.state, k)
            elif kind == "keyup":
                self.state = key_up(self.state, ev[1])
            elif kind == "unfocus":
                self.state = release_all(self.state)
            elif kind == "zoom":
                self.renderer.view.zoom(ev[1], ev[2])
            elif kind == "pan":
                self.renderer.follow = False
                self.renderer.view.pan(ev[1], ev[2])
        down = self.window.keys_down(DRIVE_KEYS)
        if down is not None:
            self.state = keep_held(self.state, down)
        axes = self.window.sticks()
        if axes is not None:
            self.state = pad(self.state, axes, self.window.buttons() or [], self.cfg)

    def advance(self, nsteps: int) -> None:
        """Run ``nsteps`` engine steps under the current request (recording each row)."""
        for _ in range(int(nsteps)):
            self.sim.align = self.state.align
            self.sim.command_twist(body_twist(self.state, float(self.sim.pose[2]), self.cfg))
            row = self.sim.step()
            self.renderer.observe(row)
            if self.recorder:
                self.recorder.write(row, self.state.align)
            self.row = row
        if self.recorder:
            self.recorder.flush()

    def draw(self) -> None:
        """Show the current state."""
        if self.row is None:
            self.advance(1)
        self.renderer.align = self.state.align
        st = self.state
        u = "world" if st.frame == "world" else "body"
        vx, vy, w = request(st, self.cfg)
        f = LEVELS[st.level]
        source = {"keys": "keys held", "pad": "pad, enabled", "none": "nothing held: stopping"}[st.source]
        lines = [("drive", f"request in the {u} frame"),
                 ("", f"vx {_fmt(vx)}  vy {_fmt(vy)} m/s"),
                 ("", f"omega {_fmt(w)} rad/s   ({source})"),
                 ("level", f"{st.level}: {100 * f:.0f} % = {_fmt(f * self.cfg.max_speed, 2)} m/s, "
                           f"{_fmt(f * self.cfg.max_turn, 2)} rad/s"),
                 ("keys", "hold f v d g s h; 1-5; F1 help")]
        if self.recorder:
            lines.append(("record", os.path.basename(self.recorder.path)))
        self.window.show(self.renderer.draw(self.row, lines), HELP if self.help else None)

    def frame(self, nsteps: int) -> bool:
        """Events, ``nsteps`` steps, picture; False once the user has quit."""
        self.handle_events()
        if self.state.quit:
            return False
        self.advance(nsteps)
        self.draw()
        return True

    # -- the loop -------------------------------------------------------------
    def run(self) -> int:
        """Drive in real time until Escape or the window is closed; returns the exit code (0)."""
        dt = self.sim.dt
        acc = 0.0
        last = time.monotonic()
        try:
            while True:
                now = time.monotonic()
                acc += min(now - last, MAX_CATCH_UP)
                last = now
                n = int(acc / dt + 1e-9)
                acc -= n * dt
                if not self.frame(n):
                    break
                self.window.tick(60)
        except KeyboardInterrupt:
            pass
        return 0

    def close(self) -> list:
        """Finish the recording (if any) and close the window; returns the files written."""
        if self.closed:
            return []
        self.closed = True
        out = []
        try:
            if self.recorder:
                if self.recorder.rows == 0:
                    self.advance(1)
                out = self.recorder.close()
        finally:
            self.window.close()
        return out

    def abort(self) -> None:
        """Close after a failure: partial recording removed."""
        if self.closed:
            return
        self.closed = True
        try:
            if self.recorder:
                self.recorder.abort()
        finally:
            self.window.close()
