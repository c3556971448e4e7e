"""Routes: waypoints in the world frame, optionally rounded corners, and the path they make.

A :class:`Route` is what a route file says (see README "Route file"); its path is a
chain of constant-curvature pieces (straight lines and circular arcs) with sharp
corners between them where ``corner_radius`` is 0.  :meth:`Route.sample` lays samples
along that path at most ``ds`` apart and returns the arrays every later stage uses
(:class:`PathSamples`).

Frames and units (REP 103): world x, y in m; angles in rad, counter-clockwise
positive; arc length ``s`` in m from the first waypoint.

Rounding: at an interior waypoint where the path turns by ``phi`` (signed, in
(-pi, pi]) an arc of radius ``r`` tangent to both legs replaces the corner; it
starts and ends ``r tan(|phi| / 2)`` from the waypoint along the legs (common
practice: the fillet of two lines), so every leg must be long enough for the arcs at
both of its ends.  The arc is split at its middle, which is where the waypoint
"is" on the rounded path (its heading, leg boundaries).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

DEFAULT_TOLERANCE = (0.01, math.radians(1.0))   # m, rad: "arrived" at the route's end pose
_TINY = 1e-9                                    # m, rad: lengths and turns below this are nothing


class RouteShapeError(ValueError):
    """A route whose path cannot be made; ``waypoint`` is the 0-based index to blame."""

    def __init__(self, waypoint: int, message: str):
        super().__init__(message)
        self.waypoint = waypoint
        self.message = message


@dataclass(frozen=True)
class Piece:
    """One constant-curvature piece of the path.

    start : (x, y) m.  tangent : rad, direction of travel at the start (unwrapped along
    the route).  length : m.  curvature : 1/m (0 on straight lines, +-1/r on arcs,
    positive turning left).  leg : index i of the leg (waypoint i to i+1) it belongs to.
    """

    start: tuple
    tangent: float
    length: float
    curvature: float
    leg: int

    def at(self, u):
        """Position (..., 2) m and tangent (...) rad at distance ``u`` (...) m along the piece."""
        u = np.asarray(u, dtype=float)
        k, h0 = self.curvature, self.tangent
        h = h0 + k * u
        if k == 0.0:
            x = self.start[0] + u * math.cos(h0)
            y = self.start[1] + u * math.sin(h0)
        else:
            x = self.start[0] + (np.sin(h) - math.sin(h0)) / k
            y = self.start[1] - (np.cos(h) - math.cos(h0)) / k
        return np.stack([x, y], axis=-1), h


@dataclass(frozen=True)
class Corner:
    """A sharp corner at waypoint ``waypoint``: the direction of travel turns by ``turn`` rad
    (in (-pi, pi], a full reversal counted as +pi) without moving."""

    waypoint: int
    turn: float


@dataclass(frozen=True, eq=False)
class PathSamples:
    """The path sampled at most ``ds`` apart.  Shapes: (m,) unless noted.

    s : m, arc length (non-decreasing; equal at the joint of two pieces, where both
    pieces' end samples are kept).  xy : (m, 2) m.  tangent : rad, unwrapped along the
    path (it jumps by the corner's turn across a sharp corner).  curvature : 1/m.
    leg : int, the leg each sample lies on.  joint : bool, True at sample j when
    samples j and j + 1 are the same point (the end of one piece and the start of the
    next).  turn : rad, the sharp turn between samples j and j + 1 (0 elsewhere).
    waypoint_s : (k,) m, where each waypoint lies along the path.
    """

    s: np.ndarray
    xy: np.ndarray
    tangent: np.ndarray
    curvature: np.ndarray
    leg: np.ndarray
    joint: np.ndarray
    turn: np.ndarray
    waypoint_s: np.ndarray

    def __len__(self) -> int:
        return len(self.s)


@dataclass(frozen=True, eq=False)
class Route:
    """A route.

    name : str.  waypoints : (k, 2) m, world frame, k >= 2, no two consecutive equal.
    headings : tuple of k floats or None, rad: the heading to hold at each waypoint
    (None: free).  corner_radius : m, >= 0 (0: sharp corners).  speed : m/s, cap on the
    path speed (``inf``: none).  tolerance : (position m, heading rad) within which the
    route's end pose counts as reached.  source : file name; lines : the file line of
    each waypoint (for messages).
    """

    name: str
    waypoints: np.ndarray
    headings: tuple
    corner_radius: float = 0.0
    speed: float = math.inf
    tolerance: tuple = DEFAULT_TOLERANCE
    source: str = "<inline>"
    lines: tuple = field(default=(), compare=False)

    def __post_init__(self):
        wp = np.array(self.waypoints, dtype=float).reshape(-1, 2)
        wp.flags.writeable = False
        object.__setattr__(self, "waypoints", wp)
        if len(self.headings) != len(wp):
            raise ValueError("one heading (or None) per waypoint")

    @property
    def path(self) -> tuple:
        """The path as a tuple of :class:`Piece` and :class:`Corner`, in order (cached).

        Raises :class:`RouteShapeError` when the corner radius does not fit.
        """
        cached = self.__dict__.get("_path")
        if cached is None:
            cached = _build_path(self.waypoints, self.corner_radius)
            object.__setattr__(self, "_path", cached)
        return cached

    @property
    def length(self) -> float:
        """m, length of the path."""
        return float(sum(p.length for p in self.path if isinstance(p, Piece)))

    def sample(self, ds: float) -> PathSamples:
        """Samples at most ``ds`` m apart on every piece (both ends of each piece kept)."""
        if not ds > 0:
            raise ValueError("ds must be > 0")
        s_parts, xy_parts, h_parts, k_parts, leg_parts = [], [], [], [], []
        turns = []               # (index of the sample before a sharp corner, turn)
        s0, count, pending = 0.0, 0, 0.0
        for item in self.path:
            if isinstance(item, Corner):
                pending += item.turn
                continue
            n = max(1, math.ceil(item.length / ds - 1e-9))
            u = item.length * np.arange(n + 1) / n
            xy, h = item.at(u)
            if count and pending:
                turns.append((count - 1, pending))
            pending = 0.0
            s_parts.append(s0 + u)
            xy_parts.append(xy)
            h_parts.append(np.asarray(h, dtype=float) * np.ones(n + 1))
            k_parts.append(np.full(n + 1, item.curvature))
            leg_parts.append(np.full(n + 1, item.leg, dtype=int))
            count += n + 1
            s0 += item.length
        s = np.concatenate(s_parts)
        joint = np.zeros(len(s), dtype=bool)
        joint[np.cumsum([len(p) for p in s_parts])[:-1] - 1] = True
        turn = np.zeros(len(s))
        for j, t in turns:
            turn[j] = t
        return PathSamples(s, np.concatenate(xy_parts), np.concatenate(h_parts), np.concatenate(k_parts),
                           np.concatenate(leg_parts), joint, turn, _waypoint_s(self.path, len(self.waypoints)))


def _waypoint_s(path, k) -> np.ndarray:
    """Arc length (m) of each waypoint: where its leg starts (legs begin at their waypoint,
    or at the middle of the arc rounding it)."""
    out = np.zeros(k)
    s = 0.0
    seen = set()
    for item in path:
        if isinstance(item, Piece):
            if item.leg not in seen:
                seen.add(item.leg)
                out[item.leg] = s
            s += item.length
    out[k - 1] = s
    return out


def wrap_turn(a: float) -> float:
    """Angle ``a`` rad wrapped to (-pi, pi] (a half turn counted as +pi)."""
    w = math.remainder(a, 2 * math.pi)
    return math.pi if w <= -math.pi + 1e-12 else w


def _build_path(wp: np.ndarray, r: float) -> tuple:
    k = len(wp)
    d = np.diff(wp, axis=0)
    L = np.hypot(d[:, 0], d[:, 1])
    for i in range(k - 1):
        if L[i] <= _TINY:
            raise RouteShapeError(i + 1, f"waypoint {i + 1} repeats waypoint {i}: consecutive waypoints "
                                  "must differ")
    ang = np.arctan2(d[:, 1], d[:, 0])
    turns = [0.0] + [wrap_turn(ang[i] - ang[i - 1]) for i in range(1, k - 1)] + [0.0]
    cut = [0.0] * k                   # m taken from each leg end by the arc at that waypoint
    if r > 0:
        for i in range(1, k - 1):
            if abs(turns[i]) <= _TINY:
                continue
            if abs(turns[i]) >= math.pi - 1e-9:
                raise RouteShapeError(i, f"the route reverses at waypoint {i}; a corner radius cannot round "
                                      "a reversal (use corner_radius: 0, or add a waypoint beside it)")
            cut[i] = r * math.tan(abs(turns[i]) / 2)
        for i in range(k - 1):
            need = cut[i] + cut[i + 1]
            if need > L[i] * (1 + 1e-9) + 1e-12:
                blame = i + 1 if cut[i + 1] >= cut[i] else i
                raise RouteShapeError(blame, f"corner_radius {r:g} m does not fit: rounding the corners at "
                                      f"both ends of the leg from waypoint {i} to {i + 1} takes {need:.4g} m "
                                      f"of it, and it is {L[i]:.4g} m long")
    out = []
    tangent = float(ang[0])
    for i in range(k - 1):
        if i > 0:
            t = turns[i]
            if cut[i] > 0:
                # second half of the arc at waypoint i
                k_arc = math.copysign(1.0 / r, t)
                half = r * abs(t) / 2
                mid = _arc_mid(wp[i], ang[i - 1], cut[i], r, t)
                out.append(Piece(tuple(mid), tangent, half, k_arc, i))
                tangent += t / 2
            elif abs(t) > _TINY:
                out.append(Corner(i, t))
                tangent += t
            else:
                tangent += t
        length = L[i] - cut[i] - cut[i + 1]
        start = wp[i] + cut[i] * np.array([math.cos(ang[i]), math.sin(ang[i])])
        if length > _TINY:
            out.append(Piece(tuple(start), tangent, float(length), 0.0, i))
        if i + 1 < k - 1 and cut[i + 1] > 0:
            t = turns[i + 1]
            k_arc = math.copysign(1.0 / r, t)
            a_start = wp[i + 1] - cut[i + 1] * np.array([math.cos(ang[i]), math.sin(ang[i])])
            out.append(Piece(tuple(a_start), tangent, r * abs(t) / 2, k_arc, i))
            tangent += t / 2
    return tuple(out)


def _arc_mid(p, a_in, cut, r, turn):
    """Middle point (2,) of the arc rounding corner ``p`` (entered along angle ``a_in``)."""
    start = p - cut * np.array([math.cos(a_in), math.sin(a_in)])
    piece = Piece(tuple(start), a_in, r * abs(turn) / 2, math.copysign(1.0 / r, turn), 0)
    xy, _ = piece.at(piece.length)
    return xy
