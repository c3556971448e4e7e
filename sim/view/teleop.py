"""Driving a base by hand: held keys and a gamepad to a twist request.

Pure functions on a frozen :class:`TeleopState`; no pygame, no window, so
the whole mapping is testable on its own.  The window loop that feeds them
is :class:`sim.view.drive.DriveSession`.

Hold to drive.  A request exists only while something asks for it: a drive
key held down, or a gamepad stick deflected while an enable button is held
(a dead-man enable, common practice on real bases).  Let go and the request
is zero at once; the engine then ramps the wheels down under the base's
acceleration limits (``max_spin_accel``), so the base comes to a stop.

Keys (pygame key names), laid out around the left index finger's home key:

* ``f`` forward, ``v`` backward (the key below it);
* ``d`` turn left (counter-clockwise), ``g`` turn right: the keys beside ``f``;
* ``s`` slide left, ``h`` slide right: one key further out (bases that can);
* held together they combine (``f`` + ``d`` is a forward arc to the left),
  opposite keys cancel;
* ``1`` .. ``5`` pick the speed level: 10, 25, 50, 75 or 100 % of the caps,
  for keys and sticks alike (starting at level 2);
* ``b`` body / world frame requests, ``p`` cycles the steering policy,
  ``escape`` quits.

A request is in the body frame (x forward, y left) or in the world frame;
:func:`body_twist` turns it into the body twist the engine is commanded with.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from sim.engine.simulator import ALIGN_POLICIES

DRIVE_KEYS = {
    "f": ("vx", +1), "v": ("vx", -1),
    "d": ("omega", +1), "g": ("omega", -1),
    "s": ("vy", +1), "h": ("vy", -1),
}
LEVELS = {1: 0.10, 2: 0.25, 3: 0.50, 4: 0.75, 5: 1.00}     # fraction of the caps per speed level
LEVEL_KEYS = {str(k): k for k in LEVELS} | {f"[{k}]": k for k in LEVELS} | {f"keypad {k}": k for k in LEVELS}
DEFAULT_LEVEL = 2
FRAME_KEY, POLICY_KEY, QUIT_KEY = "b", "p", "escape"
FRAMES = ("body", "world")
ENABLE_BUTTONS = (4, 5)   # the shoulder buttons of most pads, as SDL numbers them: either one enables


@dataclass(frozen=True)
class TeleopConfig:
    """The caps and the gamepad settings.

    max_speed : m/s, |vx| and |vy| at speed level 5 (full key, full stick).
    max_turn : rad/s, |omega| at speed level 5.
    deadband : stick deflection (0..1) read as zero.
    enable_buttons : gamepad buttons, any one of which must be held for the sticks to drive.
    """

    max_speed: float = 1.0
    max_turn: float = 1.5
    deadband: float = 0.15
    enable_buttons: tuple = ENABLE_BUTTONS

    @classmethod
    def for_robot(cls, robot, deadband: float = 0.15, enable_buttons=ENABLE_BUTTONS) -> "TeleopConfig":
        """Caps from the base: the fastest driven wheel rim speed (m/s; 1 m/s when unlimited,
        at most 5), and that speed over the base's size as the turn rate (rad/s)."""
        rims = [w.max_spin * w.radius for w in robot.wheels if w.driven and math.isfinite(w.max_spin)]
        vmax = min(max(rims), 5.0) if rims else 1.0
        return cls(max_speed=vmax, max_turn=vmax / max(robot.size, 0.1), deadband=deadband,
                   enable_buttons=tuple(enable_buttons))


@dataclass(frozen=True)
class TeleopState:
    """What is being asked for.

    held : the drive keys held down now.
    level : speed level 1..5 (:data:`LEVELS`).
    stick : (forward, left, turn), each -1..1 after the dead band, as last read.
    enabled : an enable button is held (the sticks drive only then).
    frame : ``body`` or ``world``.  align : steering policy (``wait`` | ``cosine`` | ``none``).
    quit : the user asked to stop.
    """

    held: frozenset = frozenset()
    level: int = DEFAULT_LEVEL
    stick: tuple = (0.0, 0.0, 0.0)
    enabled: bool = False
    frame: str = "body"
    align: str = "wait"
    quit: bool = False

    @property
    def source(self) -> str:
        """``keys`` when a drive key is held, else ``pad`` when the enabled sticks are deflected, else ``none``."""
        if self.held:
            return "keys"
        if self.enabled and any(self.stick):
            return "pad"
        return "none"


def key_down(state: TeleopState, key: str) -> TeleopState:
    """The state after ``key`` (a pygame key name) goes down; unknown keys change nothing."""
    if key in DRIVE_KEYS:
        return replace(state, held=state.held | {key})
    if key in LEVEL_KEYS:
        return replace(state, level=LEVEL_KEYS[key])
    if key == FRAME_KEY:
        return replace(state, frame=FRAMES[(FRAMES.index(state.frame) + 1) % len(FRAMES)])
    if key == POLICY_KEY:
        return replace(state, align=ALIGN_POLICIES[(ALIGN_POLICIES.index(state.align) + 1) % len(ALIGN_POLICIES)])
    if key == QUIT_KEY:
        return replace(state, quit=True)
    return state


def key_up(state: TeleopState, key: str) -> TeleopState:
    """The state after ``key`` is released: a drive key stops asking."""
    if key in state.held:
        return replace(state, held=state.held - {key})
    return state


def release_all(state: TeleopState) -> TeleopState:
    """Nothing held and the pad disabled (the window lost the keyboard, say)."""
    return replace(state, held=frozenset(), enabled=False, stick=(0.0, 0.0, 0.0))


def keep_held(state: TeleopState, down) -> TeleopState:
    """Drop held keys that the keyboard no longer reports down (``down``: names), so a lost
    key-up event cannot keep the base driving."""
    still = state.held & frozenset(down)
    return state if still == state.held else replace(state, held=still)


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
    triggers take 2 and 5), axis 2 on three- to five-axis pads.
    """
    n = len(axes)
    turn = 3 if n >= 6 else 2 if n >= 3 else None
    return (1 if n >= 2 else None, 0 if n >= 1 else None, turn)


def pad(state: TeleopState, axes, buttons, cfg: TeleopConfig = TeleopConfig()) -> TeleopState:
    """The state after reading the gamepad: ``axes`` (each -1..1) and ``buttons`` (pressed, by number).

    Stick up, stick left and right stick left ask for positive vx, vy and
    omega.  The sticks count only while one of ``cfg.enable_buttons`` is held.
    """
    fwd, left, turn = stick_axes(axes)
    val = lambda i: deadband(axes[i], cfg.deadband) if i is not None else 0.0
    stick = (-val(fwd) + 0.0, -val(left) + 0.0, -val(turn) + 0.0)
    enabled = any(0 <= b < len(buttons) and buttons[b] for b in cfg.enable_buttons)
    if stick == state.stick and enabled == state.enabled:
        return state
    return replace(state, stick=stick, enabled=enabled)


def request(state: TeleopState, cfg: TeleopConfig = TeleopConfig()) -> np.ndarray:
    """(3,) the request (vx m/s, vy m/s, omega rad/s) in the state's frame.

    Held keys: each axis at the level's fraction of its cap, in the direction of
    its held key (none or both: 0).  Otherwise the enabled sticks, scaled the same
    way.  Otherwise zero.
    """
    f = LEVELS[state.level]
    caps = np.array([cfg.max_speed, cfg.max_speed, cfg.max_turn]) * f
    if state.held:
        d = {"vx": 0, "vy": 0, "omega": 0}
        for k in state.held:
            field, sign = DRIVE_KEYS[k]
            d[field] += sign
        return np.array([d["vx"], d["vy"], d["omega"]], dtype=float) * caps + 0.0
    if state.enabled:
        return np.array(state.stick, dtype=float) * caps + 0.0
    return np.zeros(3)


def body_twist(state: TeleopState, theta: float, cfg: TeleopConfig = TeleopConfig()) -> np.ndarray:
    """(3,) body twist (m/s, m/s, rad/s) for the request at world heading ``theta`` rad.

    A world-frame (vx, vy) is rotated by -theta into the body frame; omega is
    the same in both frames.
    """
    vx, vy, w = request(state, cfg)
    if state.frame == "body":
        return np.array([vx, vy, w])
    c, s = math.cos(theta), math.sin(theta)
    return np.array([c * vx + s * vy, -s * vx + c * vy, w])
