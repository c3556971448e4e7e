"""Driving a base by hand: key presses and gamepad sticks to a twist request.

Pure functions on a frozen :class:`TeleopState`; no pygame, no window, so
the whole mapping is testable on its own.  The window loop that feeds them
is :class:`sim.drive.DriveSession`.

Keys (pygame key names, see :data:`KEYS`): up/w and down/s raise and lower
the forward speed, left/a and right/d the turn rate (counter-clockwise
positive), q and e the sideways speed (left positive), space stops, b
toggles body/world frame requests, p cycles the steering policy, escape
quits.  A request is in the body frame (x forward, y left) or in the world
frame; :func:`body_twist` turns it into the body twist the engine is
commanded with.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from sim.engine.simulator import ALIGN_POLICIES

KEYS = {
    "up": ("vx", +1), "w": ("vx", +1), "down": ("vx", -1), "s": ("vx", -1),
    "left": ("omega", +1), "a": ("omega", +1), "right": ("omega", -1), "d": ("omega", -1),
    "q": ("vy", +1), "e": ("vy", -1),
}
STOP_KEY, FRAME_KEY, POLICY_KEY, QUIT_KEY = "space", "b", "p", "escape"
FRAMES = ("body", "world")


@dataclass(frozen=True)
class TeleopConfig:
    """How far one key press moves the request, and the caps.

    speed_step : m/s per press (vx, vy).  turn_step : rad/s per press.
    max_speed : m/s, cap on |vx| and |vy| requests (also full stick).
    max_turn : rad/s, cap on |omega| (also full stick).
    deadband : stick deflection (0..1) read as zero.
    """

    speed_step: float = 0.05
    turn_step: float = 0.1
    max_speed: float = 1.0
    max_turn: float = 1.5
    deadband: float = 0.15

    @classmethod
    def for_robot(cls, robot, deadband: float = 0.15) -> "TeleopConfig":
        """Caps from the base: the fastest driven wheel rim speed (m/s), or 1 m/s when unlimited."""
        rims = [w.max_spin * w.radius for w in robot.wheels if w.driven and math.isfinite(w.max_spin)]
        vmax = min(max(rims), 5.0) if rims else 1.0
        return cls(max_speed=vmax, max_turn=vmax / max(robot.size, 0.1), deadband=deadband)


@dataclass(frozen=True)
class TeleopState:
    """The current request.

    vx, vy : m/s, omega : rad/s, in ``frame`` (``body`` or ``world``).
    align : steering policy (``wait`` | ``cosine`` | ``none``).
    source : ``keys`` or ``stick``, whichever set the request last.
    quit : the user asked to stop.
    """

    vx: float = 0.0
    vy: float = 0.0
    omega: float = 0.0
    frame: str = "body"
    align: str = "wait"
    source: str = "keys"
    quit: bool = False

    @property
    def request(self) -> np.ndarray:
        """(3,) the request (vx, vy, omega) in its own frame."""
        return np.array([self.vx, self.vy, self.omega])


def _clip(v, cap):
    return min(max(v, -cap), cap)


def press(state: TeleopState, key: str, cfg: TeleopConfig = TeleopConfig()) -> TeleopState:
    """The state after one press of ``key`` (a pygame key name); unknown keys change nothing."""
    if key in KEYS:
        field, sign = KEYS[key]
        step, cap = (cfg.turn_step, cfg.max_turn) if field == "omega" else (cfg.speed_step, cfg.max_speed)
        # round away float drift so that n presses up and n down give exactly 0
        val = round(_clip(getattr(state, field) + sign * step, cap), 9) + 0.0
        return replace(state, **{field: val, "source": "keys"})
    if key == STOP_KEY:
        return replace(state, vx=0.0, vy=0.0, omega=0.0, source="keys")
    if key == FRAME_KEY:
        return replace(state, frame=FRAMES[(FRAMES.index(state.frame) + 1) % len(FRAMES)])
    if key == POLICY_KEY:
        return replace(state, align=ALIGN_POLICIES[(ALIGN_POLICIES.index(state.align) + 1) % len(ALIGN_POLICIES)])
    if key == QUIT_KEY:
        return replace(state, quit=True)
    return state


def deadband(v: float, d: float) -> float:
    """Stick value with a dead band: 0 inside ``|v| <= d``, then rising linearly to +-1 at +-1."""
    v = max(-1.0, min(1.0, float(v)))
    if abs(v) <= d:
        return 0.0
    return math.copysign((abs(v) - d) / (1.0 - d), v)


def stick_axes(axes) -> tuple:
    """(forward, left, turn) axis indices for a pad with ``len(axes)`` axes (None: not there).

    Left stick: axis 1 up/down (up is negative), axis 0 left/right.  Turn:
    right stick left/right, axis 3 on pads with six or more axes (the two
    triggers take 2 and 5), axis 2 on four- and five-axis pads.
    """
    n = len(axes)
    turn = 3 if n >= 6 else 2 if n >= 3 else None
    return (1 if n >= 2 else None, 0 if n >= 1 else None, turn)


def sticks(state: TeleopState, axes, cfg: TeleopConfig = TeleopConfig()) -> TeleopState:
    """The state after reading the gamepad ``axes`` (each -1..1).

    A stick outside its dead band sets the request (full deflection = the
    caps); when every stick is back in its dead band after steering, the
    request returns to zero.  Untouched sticks leave key requests alone.
    """
    fwd, left, turn = stick_axes(axes)
    val = lambda i: deadband(axes[i], cfg.deadband) if i is not None else 0.0
    vx, vy, w = -val(fwd) * cfg.max_speed, -val(left) * cfg.max_speed, -val(turn) * cfg.max_turn
    if vx or vy or w:
        return replace(state, vx=vx + 0.0, vy=vy + 0.0, omega=w + 0.0, source="stick")
    if state.source == "stick":
        return replace(state, vx=0.0, vy=0.0, omega=0.0)
    return state


def body_twist(state: TeleopState, theta: float) -> np.ndarray:
    """(3,) body twist (m/s, m/s, rad/s) for the request at world heading ``theta`` rad.

    A world-frame (vx, vy) is rotated by -theta into the body frame; omega is
    the same in both frames.
    """
    if state.frame == "body":
        return state.request.astype(float)
    c, s = math.cos(theta), math.sin(theta)
    return np.array([c * state.vx + s * state.vy, -s * state.vx + c * state.vy, state.omega])
