"""Robot descriptions: the frozen :class:`Robot` and :class:`Wheel` (no file reading here;
see :mod:`sim.files.robotfile`).

Frames and units (REP 103): body frame x forward, y left, angles CCW from
body +x; metres, radians, seconds.  See README "Robot file" for the format.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np


WHEEL_TYPES = ("fixed", "steered", "castor", "swedish", "ball")
TYPE_CODE = {t: i for i, t in enumerate(WHEEL_TYPES)}
FIXED, STEERED, CASTOR, SWEDISH, BALL = (TYPE_CODE[t] for t in WHEEL_TYPES)

# Rows of Robot.packed, the wheels as one float array (NPARAM, n) for compiled code.
PARAMS = ("code", "x", "y", "heading", "radius", "roller", "trail", "driven", "max_spin",
          "max_spin_accel", "steer_lo", "steer_hi", "max_steer_rate", "rcos")
(P_CODE, P_X, P_Y, P_HEADING, P_RADIUS, P_ROLLER, P_TRAIL, P_DRIVEN, P_MAX_SPIN, P_MAX_ACCEL,
 P_STEER_LO, P_STEER_HI, P_STEER_RATE, P_RCOS) = range(len(PARAMS))
NPARAM = len(PARAMS)



@dataclass(frozen=True)
class Wheel:
    """One wheel of a base.

    Attributes
    ----------
    name : str
    type : str
        ``fixed`` | ``steered`` | ``castor`` | ``swedish`` | ``ball``.
    x, y : float
        m, body frame.  Contact point for fixed, Swedish and ball wheels;
        steering axis (through the contact point) for steered wheels; steering
        axis for castors, whose contact lies ``trail`` behind it.
    heading : float
        rad, direction of travel of the contact for positive spin, CCW from
        body +x.  For steered wheels and castors, the starting angle.
    radius : float
        m.
    driven : bool
        Has a drive motor (gives a rolling constraint row).
    max_spin, max_spin_accel : float
        rad/s, rad/s^2; ``inf`` when unlimited.
    steer_limits : (float, float)
        rad; ``(-inf, inf)`` when unlimited (steered only).
    max_steer_rate : float
        rad/s; ``inf`` when unlimited (steered only).
    trail : float
        m, castor only (0 otherwise).
    roller : float
        rad, Swedish roller angle gamma (0 otherwise).
    encoder : int or None
        Encoder counts per wheel revolution, if the wheel is measured.
    steer_resolution : float or None
        rad, resolution of the steering angle sensor.
    """

    name: str
    type: str
    x: float
    y: float
    heading: float
    radius: float
    driven: bool
    max_spin: float = math.inf
    max_spin_accel: float = math.inf
    steer_limits: tuple = (-math.inf, math.inf)
    max_steer_rate: float = math.inf
    trail: float = 0.0
    roller: float = 0.0
    encoder: int | None = None
    steer_resolution: float | None = None
    line: int | None = field(default=None, compare=False)

    @property
    def steerable(self) -> bool:
        """Angle changes during a run (steered by a motor, or a passive castor)."""
        return self.type in ("steered", "castor")

    @property
    def standard(self) -> bool:
        """Fixed or steered standard wheel: has a no-sliding constraint."""
        return self.type in ("fixed", "steered")


@dataclass(frozen=True)
class Robot:
    """A wheeled base: a name, a footprint, and its wheels in file order.

    The footprint is a ``length`` x ``width`` rectangle (m) centred at body
    point (``footprint_x``, ``footprint_y``), or, when ``polygon`` is given, that
    polygon: a tuple of (x, y) vertices (m, body frame, counter-clockwise, not
    repeating the first); ``length``, ``width`` and the centre are then its
    bounding box.  :attr:`outline` gives either as an array.  It is drawn, and
    checked against a floor's features (:mod:`sim.runs.clearance`).  ``warnings``:
    plausibility warnings from reading its file (objects whose ``str`` is
    ``file:line: warning: message``).
    """

    name: str
    wheels: tuple
    length: float = 0.6
    width: float = 0.4
    source: str = "<inline>"
    footprint_x: float = 0.0
    footprint_y: float = 0.0
    warnings: tuple = field(default=(), compare=False, repr=False)
    polygon: tuple | None = None

    @cached_property
    def outline(self) -> np.ndarray:
        """The footprint's vertices, shape (k, 2), m, body frame, counter-clockwise (read-only)."""
        if self.polygon is not None:
            pts = np.array(self.polygon, dtype=float)
        else:
            L, W = self.length / 2, self.width / 2
            pts = np.array([(L, -W), (L, W), (-L, W), (-L, -W)], dtype=float)
            pts += (self.footprint_x, self.footprint_y)
        pts.flags.writeable = False
        return pts

    def wheel(self, name: str) -> Wheel:
        for w in self.wheels:
            if w.name == name:
                return w
        raise KeyError(name)

    @cached_property
    def index(self) -> dict:
        """Wheel name -> position in file order."""
        return {w.name: i for i, w in enumerate(self.wheels)}

    @cached_property
    def arrays(self) -> "WheelArrays":
        return WheelArrays.of(self.wheels)

    @cached_property
    def packed(self) -> np.ndarray:
        """The wheels as one read-only float array, shape (NPARAM, n): row ``P_X`` holds every
        wheel's x, and so on (see :data:`PARAMS`; ``code`` as a float, ``driven`` 0 or 1,
        ``rcos`` the rolling row's right-hand factor ``radius cos(roller)``)."""
        a = self.arrays
        p = np.ascontiguousarray(np.vstack([a.code.astype(float), a.x, a.y, a.heading, a.radius,
                                            a.roller, a.trail, a.driven.astype(float), a.max_spin,
                                            a.max_spin_accel, a.steer_lo, a.steer_hi, a.max_steer_rate,
                                            a.radius * np.cos(a.roller)]))
        p.flags.writeable = False
        return p

    @cached_property
    def size(self) -> float:
        """m, characteristic length: RMS wheel distance from the origin (1 m if all at 0)."""
        a = self.arrays
        s = float(np.sqrt(np.mean(a.x ** 2 + a.y ** 2))) if len(a.x) else 0.0
        return s if s > 1e-9 else 1.0


@dataclass(frozen=True, eq=False)
class WheelArrays:
    """The wheels as arrays, shape (n,) each, in file order (derived once)."""

    x: np.ndarray
    y: np.ndarray
    heading: np.ndarray
    radius: np.ndarray
    roller: np.ndarray
    trail: np.ndarray
    code: np.ndarray
    driven: np.ndarray
    max_spin: np.ndarray
    max_spin_accel: np.ndarray
    steer_lo: np.ndarray
    steer_hi: np.ndarray
    max_steer_rate: np.ndarray

    @classmethod
    def of(cls, wheels) -> "WheelArrays":
        f = lambda attr: np.array([getattr(w, attr) for w in wheels], dtype=float)
        return cls(
            x=f("x"), y=f("y"), heading=f("heading"), radius=f("radius"),
            roller=f("roller"), trail=f("trail"),
            code=np.array([TYPE_CODE[w.type] for w in wheels], dtype=int),
            driven=np.array([w.driven for w in wheels], dtype=bool),
            max_spin=f("max_spin"), max_spin_accel=f("max_spin_accel"),
            steer_lo=np.array([w.steer_limits[0] for w in wheels], dtype=float),
            steer_hi=np.array([w.steer_limits[1] for w in wheels], dtype=float),
            max_steer_rate=f("max_steer_rate"),
        )

    def is_(self, *types) -> np.ndarray:
        """Boolean mask, shape (n,), of wheels of the given types (read-only, cached)."""
        cache = self.__dict__.setdefault("_masks", {})
        mask = cache.get(types)
        if mask is None:
            mask = np.zeros(len(self.code), dtype=bool)
            for t in types:
                mask |= self.code == TYPE_CODE[t]
            mask.flags.writeable = False
            cache[types] = mask
        return mask
