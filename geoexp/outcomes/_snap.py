"""Snap incident points to the nearest unit within a tolerance.

Method: one spatial-index query (shapely ``STRtree.query`` with a square of
half-side the tolerance around each point) finds every unit that may lie
within the tolerance; the exact point-to-geometry distances of those pairs
(``shapely.distance``) keep the units within it and decide the nearest.
This gives the same answer as ``STRtree.query_nearest(..., max_distance=...)``
or geopandas ``sjoin_nearest(max_distance=...)`` (both count a unit at exactly
the tolerance as within it), and on street layers it is several times faster,
because the index only has to visit the units near each point.

Ties: a point whose nearest distance is shared by two or more units (a point
on the corner where segments meet, or halfway between two parallel streets)
goes to the tied unit whose id sorts first (the smallest id); the number of
such points is reported. The rule depends only on the ids, never on the
order of the layer, so the same data give the same counts on every machine.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import shapely

from geoexp.errors import InputError
from geoexp.units import UnitSet

# Points are snapped in batches so that the candidate pairs of a dense layer
# with a generous tolerance cannot exhaust memory.
_BATCH = 250_000


@dataclass(frozen=True)
class Snapped:
    unit: np.ndarray  # int64 position of the unit in the layer, -1 if none within tolerance
    distance: np.ndarray  # float64 distance in CRS units; NaN if none within tolerance
    tied: np.ndarray  # bool: the nearest distance was shared by two or more units


def id_rank(ids) -> np.ndarray:
    """Position of each unit in ascending id order (ids are all int or all text)."""
    order = np.argsort(np.asarray(ids), kind="stable")
    rank = np.empty(len(order), dtype=np.int64)
    rank[order] = np.arange(len(order))
    return rank


def checked_tolerance(tolerance_m: object) -> float:
    """The snapping tolerance in metres, refusing anything but a finite number >= 0."""
    if isinstance(tolerance_m, bool) or not (
        isinstance(tolerance_m, (int, float, np.integer, np.floating))
        and math.isfinite(tolerance_m)
        and tolerance_m >= 0
    ):
        raise InputError(f"tolerance_m must be a number of metres >= 0, got {tolerance_m!r}")
    return float(tolerance_m)


def snap_to_units(x: np.ndarray, y: np.ndarray, units: UnitSet, tolerance_m: float) -> Snapped:
    """Nearest unit of ``units`` within ``tolerance_m`` metres of each point (in the units' CRS)."""
    geometry = np.asarray(units.geometry.array, dtype=object)
    return snap(
        x,
        y,
        geometry,
        id_rank(units.ids),
        tolerance_m / units.metres_per_unit,
        tree=shapely.STRtree(geometry),
    )


def snap(
    x: np.ndarray,
    y: np.ndarray,
    geometry: np.ndarray,
    rank: np.ndarray,
    tolerance: float,
    tree: shapely.STRtree | None = None,
) -> Snapped:
    """Nearest unit within ``tolerance`` (in CRS units) of each point ``(x, y)``.

    ``rank`` is :func:`id_rank` of the unit ids (the tie-break). Points with a
    NaN coordinate are not snapped.
    """
    n = len(x)
    unit = np.full(n, -1, dtype=np.int64)
    distance = np.full(n, np.nan)
    tied = np.zeros(n, dtype=bool)
    if n == 0 or len(geometry) == 0:
        return Snapped(unit, distance, tied)
    tree = shapely.STRtree(geometry) if tree is None else tree
    located = np.flatnonzero(np.isfinite(x) & np.isfinite(y))
    # Snap in the order of square cells a few tolerances wide, not in the file's order: nearby
    # points then visit the same branches of the index and the same units, which the processor
    # finds in its cache. Each point's answer is written back to its own row.
    cell = 8.0 * max(tolerance, 1e-9)
    located = located[np.lexsort((x[located] // cell, y[located] // cell))]
    no_rank = np.iinfo(np.int64).max
    for start in range(0, len(located), _BATCH):
        rows = located[start : start + _BATCH]
        xs, ys = x[rows], y[rows]
        # Candidates: units whose box meets the square of half-side ``tolerance`` around the
        # point (every unit within the tolerance does); the exact distance then decides. The
        # index answers a box query faster than a distance query, and each distance is
        # computed once.
        boxes = shapely.box(xs - tolerance, ys - tolerance, xs + tolerance, ys + tolerance)
        p, u = tree.query(boxes)
        del boxes
        if len(p) == 0:
            continue
        d = shapely.distance(shapely.points(xs, ys)[p], geometry[u])
        keep = d <= tolerance
        p, u, d = p[keep], u[keep], d[keep]
        if len(p) == 0:
            continue
        if np.any(p[1:] < p[:-1]):
            order = np.argsort(p, kind="stable")
            p, u, d = p[order], u[order], d[order]
        # Per point: the smallest distance, then among the units at it the smallest id rank.
        first = np.flatnonzero(np.r_[True, p[1:] != p[:-1]])
        size = np.diff(np.r_[first, len(p)])
        at_best = d == np.repeat(np.minimum.reduceat(d, first), size)
        r = np.where(at_best, rank[u], no_rank)
        pick = np.flatnonzero(at_best & (r == np.repeat(np.minimum.reduceat(r, first), size)))
        unit[rows[p[pick]]] = u[pick]
        distance[rows[p[pick]]] = d[pick]
        tied[rows[p[first]]] = np.add.reduceat(at_best.astype(np.int64), first) > 1
    return Snapped(unit, distance, tied)
