"""A floor: named walls, shelves, door frames and keep-out zones in the world frame.

Plain frozen data (no file reading here, see :mod:`sim.files.floorfile`; the
geometry is in :mod:`sim.runs.clearance`).  Coordinates are planar metres in
the scenario's world frame (x, y; REP 103).

A feature is either a polygon (solid: a shelf, a pillar, a thick wall, a
keep-out zone; the base touches it as soon as it overlaps it) or a line (a
polyline: the face of a wall, a door frame).  A feature may have several parts
(a GeoJSON MultiPolygon or MultiLineString).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

KINDS = ("polygon", "line")


def _frozen(a) -> np.ndarray:
    a = np.array(a, dtype=float).reshape(-1, 2)
    a.flags.writeable = False
    return a


@dataclass(frozen=True, eq=False)
class Feature:
    """One named floor feature.

    Attributes
    ----------
    name : str
        Used in messages and reports.
    kind : str
        ``polygon`` or ``line``.
    parts : tuple
        For a line: a tuple of vertex arrays, each shape (k, 2) m, k >= 2.
        For a polygon: a tuple of polygons, each a tuple of rings, the
        exterior first, then any holes; a ring is an array shape (k, 2) m,
        k >= 3, not repeating its first vertex.
    index : int
        Position in the floor (0-based, file order).
    line : int or None
        Line in the source file where the feature starts, when known.
    """

    name: str
    kind: str
    parts: tuple
    index: int = 0
    line: int | None = field(default=None, compare=False)

    @classmethod
    def polygon(cls, name, rings, index=0, line=None, more=()) -> "Feature":
        """A polygon feature from ``rings`` (exterior, holes...) and optional further polygons ``more``."""
        polys = (tuple(_frozen(r) for r in rings),) + tuple(tuple(_frozen(r) for r in p) for p in more)
        return cls(name, "polygon", polys, index, line)

    @classmethod
    def polyline(cls, name, points, index=0, line=None, more=()) -> "Feature":
        """A line feature through ``points`` (k, 2) and optional further lines ``more``."""
        return cls(name, "line", (_frozen(points),) + tuple(_frozen(p) for p in more), index, line)

    def vertices(self) -> np.ndarray:
        """Every vertex of every part, shape (n, 2) m."""
        if self.kind == "line":
            return np.vstack(self.parts)
        return np.vstack([r for poly in self.parts for r in poly])


@dataclass(frozen=True, eq=False)
class Floor:
    """The features of a floor in file order, and where they came from."""

    features: tuple
    source: str = "<inline>"

    def __len__(self) -> int:
        return len(self.features)

    def feature(self, name: str) -> Feature:
        for f in self.features:
            if f.name == name:
                return f
        raise KeyError(name)

    def bounds(self):
        """(xmin, xmax, ymin, ymax) m of all features, or None for an empty floor."""
        if not self.features:
            return None
        v = np.vstack([f.vertices() for f in self.features])
        return (float(v[:, 0].min()), float(v[:, 0].max()), float(v[:, 1].min()), float(v[:, 1].max()))
