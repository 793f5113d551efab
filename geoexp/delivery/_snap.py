"""Snap many points (GPS pings, logged positions) to the nearest unit within a tolerance.

Method: the units' lines (or polygon rings) are cut into straight pieces no
longer than ``piece`` metres, and a k-d tree (``scipy.spatial.cKDTree``) is
built on the pieces' midpoints. A point can only be within ``tolerance`` of a
piece whose midpoint is within ``tolerance + piece / 2``, so a query for the
few nearest midpoints inside that radius gives candidate pieces, whose exact
point-to-segment distances are computed with numpy. The answer is exact, not
an approximation by densified vertices: a point is resolved when its k-th
nearest midpoint is farther than the best exact distance plus half a piece
(no unseen piece can then be as near); the few points that are not are asked
again with a larger k, and the rest with a radius query. Points are queried in
the order of square grid cells (for the processor's cache; the answer does not
depend on the order). Everything runs on whole arrays; nothing loops over
points in Python.

A point inside a parcel polygon is at distance 0 from it: for parcel layers
the points covered by a parcel are found first with a shapely ``STRtree``
query, and only the others are measured to the parcels' outlines. Ties (equal
distances, e.g. a ping on the corner shared by two segments) go to the unit
whose id sorts first, as when incidents are counted, so the answer never
depends on the layer's order.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import shapely
from scipy.spatial import cKDTree

from geoexp._engine import thread_count

# Candidates asked for in the first and second pass (most points resolve in the first).
_FIRST_K, _SECOND_K = 3, 8


@dataclass(frozen=True, eq=False)
class UnitIndex:
    """The units cut into straight pieces, with a k-d tree on the pieces' midpoints.

    Coordinates are in the units' CRS; ``piece`` is in the same units.
    """

    a: np.ndarray  # (m, 2) first end of each piece
    b: np.ndarray  # (m, 2) second end
    owner: np.ndarray  # (m,) int64 position of the unit each piece belongs to
    tree: cKDTree
    piece: float
    rank: np.ndarray  # (n_units,) position of each unit in ascending id order (tie-break)
    polygons: shapely.STRtree | None  # a tree of the parcels of a parcel layer (None for lines)

    @classmethod
    def build(cls, geometry: np.ndarray, rank: np.ndarray, piece: float) -> UnitIndex:
        """Cut ``geometry`` (lines or polygons) into pieces of at most ``piece`` CRS units."""
        kinds = set(shapely.get_type_id(geometry).tolist())
        polygonal = bool(kinds & {3, 6})
        lines = shapely.boundary(geometry) if polygonal else geometry
        lines = shapely.segmentize(lines, piece)
        # Parts of multi-lines must not be joined end to start: index coordinates by part.
        parts, owner = shapely.get_parts(lines, return_index=True)
        xy, part = shapely.get_coordinates(parts, return_index=True)
        same = part[1:] == part[:-1]
        a, b = xy[:-1][same], xy[1:][same]
        owner = owner[part[:-1][same]].astype(np.int64)
        tree = cKDTree((a + b) / 2.0)
        return cls(
            a,
            b,
            owner,
            tree,
            float(piece),
            np.asarray(rank, dtype=np.int64),
            shapely.STRtree(geometry) if polygonal else None,
        )


def _segment_distance(px, py, a, b) -> np.ndarray:
    """Exact distance from points to straight pieces (arrays of equal length)."""
    vx, vy = b[:, 0] - a[:, 0], b[:, 1] - a[:, 1]
    wx, wy = px - a[:, 0], py - a[:, 1]
    length2 = vx * vx + vy * vy
    with np.errstate(invalid="ignore", divide="ignore"):
        s = np.where(length2 > 0, (wx * vx + wy * vy) / length2, 0.0)
    s = np.clip(s, 0.0, 1.0)
    return np.hypot(wx - s * vx, wy - s * vy)


def _best_of_rows(index: UnitIndex, px, py, cand, found):
    """Nearest unit (tie: smallest id) for each point, among its row of candidate pieces."""
    n, k = cand.shape
    safe = np.where(found, cand, 0)
    d = _segment_distance(
        np.repeat(px, k), np.repeat(py, k), index.a[safe.ravel()], index.b[safe.ravel()]
    ).reshape(n, k)
    d[~found] = np.inf
    u = index.owner[safe]
    best = d.min(axis=1)
    # Among the candidates at the best distance, the unit whose id sorts first.
    rank = np.where(d == best[:, None], index.rank[u], np.iinfo(np.int64).max)
    pick = rank.argmin(axis=1)
    unit = np.where(np.isfinite(best), u[np.arange(n), pick], -1)
    return unit, best


def _best(index: UnitIndex, px, py, cand, rows, n_rows):
    """Nearest unit (tie: smallest id) among candidate pieces ``cand`` of points ``rows``."""
    unit = np.full(n_rows, -1, dtype=np.int64)
    dist = np.full(n_rows, np.inf)
    if len(rows) == 0:
        return unit, dist
    d = _segment_distance(px[rows], py[rows], index.a[cand], index.b[cand])
    u = index.owner[cand]
    order = np.lexsort((index.rank[u], d, rows))
    rows, u, d = rows[order], u[order], d[order]
    first = np.flatnonzero(np.r_[True, rows[1:] != rows[:-1]])
    unit[rows[first]] = u[first]
    dist[rows[first]] = d[first]
    return unit, dist


def snap_points(index: UnitIndex, x: np.ndarray, y: np.ndarray, tolerance: float):
    """Nearest unit within ``tolerance`` of each point, exactly.

    Parameters
    ----------
    index : UnitIndex
        The units' snapping index, built by :func:`unit_index`.
    x, y : numpy.ndarray
        Coordinates in the units' CRS; points with a NaN coordinate are not snapped.
    tolerance : float
        In CRS units; a unit at exactly the tolerance is within it.

    Returns
    -------
    unit : numpy.ndarray
        int64 position of the unit, -1 where none is within the tolerance.
    distance : numpy.ndarray
        float64 distance in CRS units, NaN where no unit was found.
    """
    n = len(x)
    unit = np.full(n, -1, dtype=np.int64)
    distance = np.full(n, np.nan)
    located = np.flatnonzero(np.isfinite(x) & np.isfinite(y))
    if len(located) == 0 or len(index.owner) == 0:
        return unit, distance
    if index.polygons is not None:
        # Points inside a parcel: distance 0, the smallest id among covering parcels.
        p, u = index.polygons.query(shapely.points(x[located], y[located]), predicate="intersects")
        if len(p):
            order = np.lexsort((index.rank[u], p))
            p, u = p[order], u[order]
            first = np.flatnonzero(np.r_[True, p[1:] != p[:-1]])
            unit[located[p[first]]] = u[first]
            distance[located[p[first]]] = 0.0
            located = np.delete(located, p[first])
            if len(located) == 0:
                return unit, distance
    radius = tolerance + index.piece / 2.0
    # Query in the order of square cells of a few radii, not in the file's (time) order: nearby
    # points then walk the same branches of the tree and the same pieces, which the processor
    # finds in its cache (two to three times faster on shuffled GPS pings).
    cell = 8.0 * max(radius, 1e-9)
    located = located[np.lexsort((x[located] // cell, y[located] // cell))]
    px, py = x[located], y[located]
    workers = thread_count()
    pending = np.arange(len(located))
    best_u = np.full(len(located), -1, dtype=np.int64)
    best_d = np.full(len(located), np.inf)
    for k in (_FIRST_K, _SECOND_K):
        k = min(k, len(index.owner))
        dm, cand = index.tree.query(
            np.column_stack([px[pending], py[pending]]),
            k=k,
            distance_upper_bound=radius,
            workers=workers,
        )
        dm, cand = dm.reshape(len(pending), k), cand.reshape(len(pending), k)
        u, d = _best_of_rows(index, px[pending], py[pending], cand, np.isfinite(dm))
        best_u[pending], best_d[pending] = u, d
        # Resolved: fewer than k pieces within the radius, or the k-th midpoint is so far
        # that no unseen piece can be as near as the best one found.
        open_ = np.isfinite(dm[:, -1]) & (dm[:, -1] - index.piece / 2.0 <= d)
        if k == len(index.owner):
            open_[:] = False
        pending = pending[open_]
        if len(pending) == 0:
            break
    if len(pending):
        lists = index.tree.query_ball_point(
            np.column_stack([px[pending], py[pending]]), r=radius, workers=workers
        )
        sizes = np.fromiter((len(v) for v in lists), dtype=np.int64, count=len(lists))
        cand = np.fromiter((j for v in lists for j in v), dtype=np.int64, count=int(sizes.sum()))
        rows = np.repeat(np.arange(len(pending)), sizes)
        u, d = _best(index, px[pending], py[pending], cand, rows, len(pending))
        best_u[pending], best_d[pending] = u, d
    ok = best_d <= tolerance
    unit[located[ok]] = best_u[ok]
    distance[located[ok]] = best_d[ok]
    return unit, distance
