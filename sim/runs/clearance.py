"""Clearance between a base's footprint and a floor's features, over a run.

Geometry is shapely 2 (GEOS), vectorised over rows: the footprint polygon at
every row comes from one numpy transform (:func:`footprints`); per chunk of
rows, STR trees of footprints answer for every feature at once which rows come
near (``STRtree.query_nearest``, ``query`` with ``dwithin``), and the exact
distances of those rows are computed in one ``shapely.distance`` call (see
:meth:`ClearanceMeter._measure`).  No Python loop runs per row or per feature
pair.  Memory stays flat: :class:`ClearanceMeter` takes rows a chunk at a time
and keeps only the running minima (and, when asked, the swept area).

Terms (lengths in m, world frame unless said otherwise):

* clearance to a feature at a row: the distance between the footprint polygon
  at that row and the feature; 0 when they touch or overlap (a contact).
  Polygons are solid: a base inside a keep-out zone is in contact with it.
* the nearest approach to a feature: the smallest clearance over the rows,
  with the earliest row where it occurs, the point on the base and the point
  on the feature (``shapely.shortest_line``).
* first contact: the earliest row whose footprint touches any feature.
* swept area: the union of the footprint over the run.  Between rows kept by
  sleeve-fitting (Zhao & Saalfeld, "Linear-time sleeve-fitting polyline
  simplification algorithms", AutoCarto 13, 1997), applied to all footprint
  vertices at once, every vertex of every row lies within ``tolerance`` of the
  straight chord joining its positions at the kept rows; the area is the union of
  the convex hull of each kept pair's footprints (convex footprints), or of the
  two footprints and the quadrilaterals their edges sweep (other footprints).
  So the boundary is within ``tolerance`` of that of the union of all rows'
  footprints, plus the sag of one step's arc.  A pure translation is exact.

Clearance is measured at the rows (every step of the run): a base that moves
more than its own length in one step could pass a thin feature unseen.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from sim.jit import kernel

CHUNK = 20_000          # rows per vectorised batch
SWEEP_TOLERANCE = 1e-3  # m, see the module docstring
SWEEP_BATCH = 64        # pieces of the swept area merged at a time
WINDOW = 8              # rows per window of the first, coarse stage of the distances


# --------------------------------------------------------------------------
# footprints


def world_vertices(outline, poses) -> np.ndarray:
    """Footprint vertices in the world at each pose.

    outline : (k, 2) m, body frame.  poses : (m, 3) world x (m), y (m), theta (rad).
    Returns (m, k, 2) m.
    """
    o = np.asarray(outline, dtype=float)
    p = np.asarray(poses, dtype=float).reshape(-1, 3)
    c, s = np.cos(p[:, 2])[:, None], np.sin(p[:, 2])[:, None]
    x = p[:, 0:1] + c * o[:, 0] - s * o[:, 1]
    y = p[:, 1:2] + s * o[:, 0] + c * o[:, 1]
    return np.stack([x, y], axis=2)


def footprints(outline, poses) -> np.ndarray:
    """The footprint polygon at each pose: shapely Polygons, shape (m,).  See :func:`world_vertices`."""
    return polygons(world_vertices(outline, poses))


def polygons(V) -> np.ndarray:
    """Shapely Polygons, shape (m,), from vertex rings ``V`` (m, k, 2) (not closed)."""
    import shapely
    m, k = V.shape[0], V.shape[1]
    closed = np.concatenate([V, V[:, :1]], axis=1).reshape(-1, 2)
    return shapely.from_ragged_array(shapely.GeometryType.POLYGON, closed,
                                     (np.arange(0, m * (k + 1) + 1, k + 1), np.arange(m + 1)))


def feature_geometry(feature):
    """A :class:`~sim.model.floor.Feature` as a shapely geometry (Multi* when it has several parts)."""
    import shapely
    if feature.kind == "line":
        parts = [shapely.LineString(p) for p in feature.parts]
        return parts[0] if len(parts) == 1 else shapely.MultiLineString(parts)
    parts = [shapely.Polygon(r[0], r[1:]) for r in feature.parts]
    return parts[0] if len(parts) == 1 else shapely.MultiPolygon(parts)


# --------------------------------------------------------------------------
# results


@dataclass(frozen=True)
class Nearest:
    """The nearest approach of the base to one feature.

    distance : m (0: touching).  t : s.  row : row index (0-based) of the first
    row at that distance.  pose : (x, y, theta) world at that row.
    base_point, feature_point : (x, y) m, world, the closest pair.
    body_point : base_point in the body frame (m).
    """

    feature: str
    index: int
    distance: float
    t: float
    row: int
    pose: tuple
    base_point: tuple
    feature_point: tuple
    body_point: tuple


@dataclass(frozen=True)
class Contact:
    """The first row at which the footprint touches a feature; ``point`` (world) and
    ``body_point`` (body frame) are a point they share (m)."""

    feature: str
    index: int
    t: float
    row: int
    point: tuple
    body_point: tuple


@dataclass
class Clearance:
    """What :class:`ClearanceMeter` measured.

    features : tuple of :class:`Nearest`, one per floor feature in file order.
    first_contact : :class:`Contact` or None.  contact_rows : rows in contact with any feature.
    rows : rows measured.  swept : shapely geometry of the swept area, or None when not asked.
    tolerance : m, of the swept area.
    """

    features: tuple
    first_contact: Contact | None
    contact_rows: int
    rows: int
    swept: object = None
    tolerance: float = SWEEP_TOLERANCE

    @property
    def nearest(self) -> Nearest | None:
        """The smallest clearance over all features (earliest, then first in the file, on a tie)."""
        if not self.features:
            return None
        return min(self.features, key=lambda n: (n.distance, n.t, n.index))

    @property
    def swept_area(self) -> float:
        """m^2 (NaN when the swept area was not computed)."""
        return float(self.swept.area) if self.swept is not None else math.nan

    def lines(self, step: float | None = None) -> list:
        """The report for people, one line each (``step`` s turns contact rows into time)."""
        n = self.nearest
        out = []
        if n is None:
            return ["clearance: the floor has no features"]
        bx, by = n.body_point
        out.append(f"smallest clearance {n.distance:.4g} m to '{n.feature}' at t={n.t:g} s "
                   f"(base point ({bx:.3f}, {by:.3f}) m in the body frame, feature point "
                   f"({n.feature_point[0]:.3f}, {n.feature_point[1]:.3f}) m)")
        c = self.first_contact
        if c is None:
            out.append("no contact")
        else:
            dur = f", {self.contact_rows * step:g} s" if step else ""
            out.append(f"first contact with '{c.feature}' at t={c.t:g} s at ({c.point[0]:.3f}, {c.point[1]:.3f}) m "
                       f"(body ({c.body_point[0]:.3f}, {c.body_point[1]:.3f}) m); {self.contact_rows} rows "
                       f"in contact{dur}")
        return out


# --------------------------------------------------------------------------
# the meter


class ClearanceMeter:
    """Streams rows and keeps the nearest approach to each feature, the first contact
    and (``swept=True``) the swept area.

    outline : (k, 2) m, the footprint in the body frame (``Robot.outline``).
    floor : :class:`~sim.model.floor.Floor`.
    tolerance : m, of the swept area (see the module docstring).

    Feed rows in order with :meth:`add`; :meth:`result` may be called at any time.
    """

    def __init__(self, outline, floor, swept: bool = False, tolerance: float = SWEEP_TOLERANCE):
        import shapely

        self.outline = np.array(outline, dtype=float).reshape(-1, 2)
        self.floor = floor
        self.names = [f.name for f in floor.features]
        self.geoms = np.array([feature_geometry(f) for f in floor.features], dtype=object)
        self.tree = shapely.STRtree(self.geoms)
        n = len(self.geoms)
        self.best = np.full(n, math.inf)
        self.best_row = np.full(n, -1, dtype=np.int64)
        self.best_t = np.zeros(n)
        self.best_pose = np.zeros((n, 3))
        self.first = None            # (row, t, feature index, pose)
        self.contact_rows = 0
        self.touching = False        # the last row added is in contact
        self.rows = 0
        self.want_swept = swept
        self.tolerance = float(tolerance)
        k = len(self.outline)
        self._anchor = None          # (k, 2) vertices where the open stretch of the sweep starts
        self._last = None            # (k, 2) vertices of the last row taken
        self._cone = (np.zeros(k), np.zeros(k, dtype=np.bool_), np.zeros(k), np.zeros(k), np.zeros(k))
        self._pieces = []            # pieces of the swept area not yet merged (shapely geometries)
        self._merged = None          # union of the merged pieces
        self._swept = None           # cached union of everything so far
        hull = shapely.convex_hull(shapely.Polygon(self.outline))
        self.convex = abs(hull.area - shapely.Polygon(self.outline).area) <= 1e-12 * max(hull.area, 1e-300)

    def add(self, t, poses) -> None:
        """Take the next rows: ``t`` (m,) s and ``poses`` (m, 3) world x, y (m), theta (rad)."""
        import shapely

        t = np.asarray(t, dtype=float).reshape(-1)
        poses = np.asarray(poses, dtype=float).reshape(-1, 3)
        for a in range(0, len(t), CHUNK):
            self._add(shapely, t[a:a + CHUNK], poses[a:a + CHUNK])

    def _add(self, shapely, t, poses):
        m = len(t)
        if m == 0:
            return
        V = world_vertices(self.outline, poses)
        if len(self.geoms):
            self._measure(shapely, t, poses, V)
        if self.want_swept:
            self._sweep(shapely, V)
        self.rows += m

    def _measure(self, shapely, t, poses, V):
        """Nearest approach to every feature and contacts over one chunk of rows, exactly.

        Two stages, so that exact distances are computed only where they can matter:
        the rows are cut into windows of ``WINDOW``; within a window no footprint vertex
        moves farther than ``slack`` from where it is at the window's first row, so no
        distance changes by more than that (for a rigid motion the farthest-moving point
        of a polygon is a vertex).  An STR tree of the windows' first footprints gives
        each feature a distance that some row reaches (``query_nearest``); only windows
        whose first footprint lies within that distance plus the slack (``query`` with
        ``dwithin``) can hold a row as near, or a contact, and only their rows are measured.
        """
        m, k0, s = len(t), self.rows, WINDOW
        starts = np.arange(0, m, s)
        win = np.arange(m) // s
        disp = np.sqrt(np.sum((V - V[starts][win]) ** 2, axis=2)).max(axis=1)
        slack = float(disp.max())
        first = polygons(V[starts])
        tree = shapely.STRtree(first)
        (fi, ci), d = tree.query_nearest(self.geoms, return_distance=True, all_matches=False)
        reach = np.full(len(self.geoms), math.inf)
        np.minimum.at(reach, fi, d)
        bound = np.minimum(reach, self.best)
        # (1 nm more: GEOS's distances in the tree queries may differ from each other by rounding)
        f_idx, c_idx = tree.query(self.geoms, predicate="dwithin", distance=bound + slack + 1e-9)
        if not len(f_idx):
            self.touching = False
            return
        counts = np.minimum(s, m - starts[c_idx])
        pf = np.repeat(f_idx, counts)
        offs = np.arange(int(counts.sum())) - np.repeat(np.cumsum(counts) - counts, counts)
        pr = np.repeat(starts[c_idx], counts) + offs
        rows, inv = np.unique(pr, return_inverse=True)
        dist = shapely.distance(self.geoms[pf], polygons(V[rows])[inv])
        # per feature: the least distance, at its earliest row
        order = np.lexsort((pr, dist, pf))
        pf_s, pr_s, d_s = pf[order], pr[order], dist[order]
        lead = np.flatnonzero(np.r_[True, pf_s[1:] != pf_s[:-1]])
        f, r, dd = pf_s[lead], pr_s[lead], d_s[lead]
        better = dd < self.best[f]               # strictly: an earlier chunk keeps a tie
        f, r, dd = f[better], r[better], dd[better]
        self.best[f] = dd
        self.best_row[f] = k0 + r
        self.best_t[f] = t[r]
        self.best_pose[f] = poses[r]
        # contacts: distance 0 (touching or overlapping); every such row is among those measured
        hit = dist == 0.0
        touched = np.unique(pr[hit])
        self.contact_rows += len(touched)
        self.touching = bool(len(touched) and touched[-1] == m - 1)
        if len(touched) and self.first is None:
            r0 = int(touched[0])
            f0 = int(pf[hit & (pr == r0)].min())
            self.first = (k0 + r0, float(t[r0]), f0, poses[r0].copy())

    def _sweep(self, shapely, V):
        """Extend the swept area by rows with vertices ``V`` (m, k, 2).

        The stretches and the batches merged do not depend on how the rows
        were split into calls, so neither does the area.
        """
        self._swept = None
        if self._anchor is None:
            self._anchor, self._last = V[0].copy(), V[0].copy()
            self._pieces.append(polygons(V[:1])[0])
            V = V[1:]
            if not len(V):
                return
        W = np.concatenate([self._last[None], V])
        kept = np.empty(len(W), dtype=np.int64)
        start = self._anchor.copy()
        nk = sleeve_fit(W, self.tolerance, self._anchor, *self._cone, kept)
        if nk:
            ends = W[kept[:nk]]
            self._pieces.extend(self._stretches(shapely, np.concatenate([start[None], ends[:-1]]), ends))
        self._last = W[-1].copy()
        while len(self._pieces) >= SWEEP_BATCH:
            batch = shapely.union_all(np.array(self._pieces[:SWEEP_BATCH], dtype=object))
            self._merged = batch if self._merged is None else shapely.union(self._merged, batch)
            del self._pieces[:SWEEP_BATCH]

    def _stretches(self, shapely, A, B) -> list:
        """Pieces of the area swept from vertices ``A`` to ``B`` (s, k, 2), in order."""
        if self.convex:
            return list(shapely.convex_hull(shapely.multipoints(np.concatenate([A, B], axis=1))))
        k = A.shape[1]
        e0, e1 = np.arange(k), (np.arange(k) + 1) % k
        quads = np.stack([A[:, e0], A[:, e1], B[:, e1], B[:, e0]], axis=2)      # (s, k, 4, 2)
        hulls = shapely.convex_hull(shapely.multipoints(quads.reshape(-1, 4, 2))).reshape(len(A), k)
        ends = polygons(B)
        return [g for j in range(len(A)) for g in (*hulls[j], ends[j])]

    @property
    def swept(self):
        """The area swept so far (a shapely geometry), or None before any row or when not asked."""
        import shapely

        if not self.want_swept or self._anchor is None:
            return None
        if self._swept is None:
            parts = self._pieces + self._stretches(shapely, self._anchor[None], self._last[None])
            geom = shapely.union_all(np.array(parts, dtype=object))
            self._swept = geom if self._merged is None else shapely.union(self._merged, geom)
        return self._swept

    def result(self) -> Clearance:
        """The measurements so far (closest pairs computed here, one per feature)."""
        seen = np.flatnonzero(self.best_row >= 0)
        feats = tuple(self._nearest_of(seen))
        return Clearance(feats, self.first_contact(), self.contact_rows, self.rows, self.swept, self.tolerance)

    def nearest(self) -> Nearest | None:
        """The smallest clearance so far over all features (earliest, then first in the file, on a tie)."""
        seen = np.flatnonzero(self.best_row >= 0)
        if not len(seen):
            return None
        i = min(seen, key=lambda j: (self.best[j], self.best_t[j], j))
        return self._nearest_of([i])[0]

    def _nearest_of(self, idx) -> list:
        import shapely

        idx = np.asarray(idx, dtype=np.int64)
        if not len(idx):
            return []
        fps = footprints(self.outline, self.best_pose[idx])
        pairs = shapely.get_coordinates(shapely.shortest_line(fps, self.geoms[idx])).reshape(-1, 2, 2)
        out = []
        for j, i in enumerate(idx):
            pose = self.best_pose[i]
            bp, fp = pairs[j]
            out.append(Nearest(self.names[i], int(i), float(self.best[i]), float(self.best_t[i]),
                               int(self.best_row[i]), tuple(float(v) for v in pose),
                               (float(bp[0]), float(bp[1])), (float(fp[0]), float(fp[1])), _to_body(pose, bp)))
        return out

    def first_contact(self) -> Contact | None:
        """The first contact so far, or None."""
        import shapely

        if self.first is None:
            return None
        row, t, f, pose = self.first
        fp = footprints(self.outline, pose[None])[0]
        pt = shapely.get_coordinates(shapely.shortest_line(fp, self.geoms[f]))[0]
        return Contact(self.names[f], f, t, row, (float(pt[0]), float(pt[1])), _to_body(pose, pt))


def _to_body(pose, p) -> tuple:
    """World point ``p`` (2,) m in the body frame of ``pose`` (x, y, theta)."""
    c, s = math.cos(pose[2]), math.sin(pose[2])
    dx, dy = float(p[0]) - pose[0], float(p[1]) - pose[1]
    return (float(c * dx + s * dy), float(-s * dx + c * dy))


def clearance_along(footprint, poses, floor, t=None, swept: bool = False,
                    tolerance: float = SWEEP_TOLERANCE) -> Clearance:
    """Clearance of a base with outline ``footprint`` (k, 2) m (body frame, e.g.
    ``Robot.outline``) at ``poses`` (m, 3) (world x, y m, theta rad) to ``floor``.

    ``t`` (m,) s labels the rows (default: the row index).  ``swept`` also
    computes the swept area.  For a planned route, pass its poses sampled finely
    enough (see the module docstring).
    """
    poses = np.asarray(poses, dtype=float).reshape(-1, 3)
    t = np.arange(len(poses), dtype=float) if t is None else np.asarray(t, dtype=float)
    meter = ClearanceMeter(footprint, floor, swept=swept, tolerance=tolerance)
    meter.add(t, poses)
    return meter.result()


# --------------------------------------------------------------------------
# which rows the swept area needs (sleeve-fitting on all vertices at once)


@kernel
def sleeve_fit(W, tol, anchor, far, has, ref, lo, hi, kept):
    """Where the stretches of the swept area end, so that every vertex path stays within ``tol``
    of its chords.

    W : (n, k, 2) m, footprint vertices: W[0] the last row already taken, W[1:] new rows.
    tol : m.  anchor : (k, 2), vertices where the open stretch starts.  far, has, ref, lo,
    hi : (k,) the open stretch's state (farthest distance from the anchor; whether a cone
    of directions is set; its reference direction and bounds, rad).  All updated in place.
    kept : (n,) int64, filled with the rows (indices into W, increasing) that end a stretch.
    Returns how many.

    Greedy sleeve-fitting (Zhao & Saalfeld 1997) on all k vertex paths at once: the stretch
    from the anchor may end at row j when, for every vertex, the points of the rows since
    the anchor lie within ``tol`` of the segment from the anchor to row j: row j's direction
    lies in the cone narrowed by each point farther than ``tol`` from the anchor, and no
    point lies farther from the anchor than row j.  Otherwise the stretch ends at row j - 1.
    """
    n = W.shape[0]
    k = W.shape[1]
    nk = 0
    j = 1
    while j < n:
        ok = True
        for i in range(k):
            if far[i] <= tol:
                continue
            dx = W[j, i, 0] - anchor[i, 0]
            dy = W[j, i, 1] - anchor[i, 1]
            d = math.sqrt(dx * dx + dy * dy)
            if d < far[i]:
                ok = False
                break
            if has[i]:
                phi = math.atan2(dy, dx) - ref[i]
                phi = math.atan2(math.sin(phi), math.cos(phi))
                if phi < lo[i] or phi > hi[i]:
                    ok = False
                    break
        if not ok:
            kept[nk] = j - 1
            nk += 1
            for i in range(k):
                anchor[i, 0] = W[j - 1, i, 0]
                anchor[i, 1] = W[j - 1, i, 1]
                far[i] = 0.0
                has[i] = False
            continue
        for i in range(k):
            dx = W[j, i, 0] - anchor[i, 0]
            dy = W[j, i, 1] - anchor[i, 1]
            d = math.sqrt(dx * dx + dy * dy)
            if d > far[i]:
                far[i] = d
            if d > tol:
                w = math.asin(tol / d)
                if not has[i]:
                    ref[i] = math.atan2(dy, dx)
                    lo[i] = -w
                    hi[i] = w
                    has[i] = True
                else:
                    phi = math.atan2(dy, dx) - ref[i]
                    phi = math.atan2(math.sin(phi), math.cos(phi))
                    lo[i] = max(lo[i], phi - w)
                    hi[i] = min(hi[i], phi + w)
        j += 1
    return nk
