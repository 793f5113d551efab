"""Pairs of geometries within a distance, measured between the geometries themselves.

Candidates come from a KD-tree over bounding-box centres with the search
radius widened by the boxes' half-diagonals (a geometry lies inside its box,
so two geometries within ``d`` have centres within ``d + r_i + r_j``). Units
are put into a few buckets by size so that a handful of large units does not
widen the radius for everyone. Candidates are then screened by the exact
box-to-box distance (a lower bound of the geometry distance) and the
survivors measured with GEOS. Work is done in chunks of sources so that peak
memory follows the number of pairs in a chunk, not the number of units squared.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numpy as np
import shapely
from scipy.spatial import cKDTree

from geoexp._engine import Engine, compute_threads, jit, resolve_engine

# Candidate pairs per chunk; bounds the chunk's temporary arrays (~100 bytes a pair).
CHUNK_CANDIDATES = 1_500_000
# Units whose box half-diagonals differ by more than this factor go to different buckets.
BUCKET_FACTOR = 4.0
MAX_BUCKETS = 5


def euclidean_pairs(
    geoms: np.ndarray, max_distance: float, scale: float, engine: Engine = "auto"
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Undirected pairs ``(i, j, metres)`` with ``i < j`` and distance <= ``max_distance``.

    ``geoms`` are shapely geometries in a projected CRS whose length unit is
    ``scale`` metres; ``max_distance`` is in metres. Positions refer to ``geoms``.
    ``engine`` runs the box screen of the candidates in numba or numpy (the
    same pairs either way).
    """
    n = len(geoms)
    empty = (np.empty(0, np.int64), np.empty(0, np.int64), np.empty(0, np.float64))
    if n < 2:
        return empty
    bounds = shapely.bounds(geoms)
    centre = (bounds[:, :2] + bounds[:, 2:]) * 0.5
    half = (bounds[:, 2:] - bounds[:, :2]) * 0.5
    radius = np.hypot(half[:, 0], half[:, 1])
    d_crs = max_distance / scale
    # Slack so that rounding in the bound never drops a pair at exactly max_distance.
    slack = 1e-9 * (d_crs + float(radius.max()) + 1.0)

    buckets = _size_buckets(radius)
    jobs = []
    for p, src in enumerate(buckets):
        for q in range(p, len(buckets)):
            dst = buckets[q]
            reach = d_crs + radius[src].max() + radius[dst].max() + slack
            jobs.append((src, dst, p == q, reach))

    used = resolve_engine(engine)
    context = (geoms, centre, half, d_crs + slack, scale, max_distance, used)
    tasks: list[tuple[cKDTree, np.ndarray, np.ndarray, bool, float]] = []
    for src, dst, same, reach in jobs:
        tree = cKDTree(centre[dst])
        for start, stop in _chunks(tree, centre[src], reach):
            tasks.append((tree, src[start:stop], dst, same, reach))

    def measure(
        task: tuple[cKDTree, np.ndarray, np.ndarray, bool, float],
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        return _measure_chunk(*task, context)

    # the KD-tree traversal and GEOS distances release the GIL: one worker thread per core
    with compute_threads() as n_threads:
        if n_threads > 1 and len(tasks) > 1:
            with ThreadPoolExecutor(n_threads) as pool:
                parts = list(pool.map(measure, tasks))
        else:
            parts = [measure(t) for t in tasks]
    if not parts:
        return empty
    # Concatenate one column at a time, dropping each column's chunks as it goes,
    # so that the chunks and the result are never both held in full.
    columns = [list(column) for column in zip(*parts, strict=True)]
    del parts
    out = []
    for k in range(3):
        out.append(np.concatenate(columns[k]))
        columns[k] = []
    return out[0], out[1], out[2]


def _size_buckets(radius: np.ndarray) -> list[np.ndarray]:
    """Positions grouped by box size (ascending positions inside each group)."""
    positive = radius[radius > 0]
    if positive.size == 0:
        return [np.arange(radius.size)]
    typical = float(np.median(positive))
    if radius.max() <= BUCKET_FACTOR * typical:
        return [np.arange(radius.size)]
    level = np.floor(np.log(np.maximum(radius, typical) / typical) / np.log(BUCKET_FACTOR))
    level = np.minimum(level.astype(np.int64), MAX_BUCKETS - 1)
    return [np.flatnonzero(level == k) for k in np.unique(level)]


def _chunks(tree: cKDTree, points: np.ndarray, reach: float) -> list[tuple[int, int]]:
    """Split source points into runs expected to yield about CHUNK_CANDIDATES candidates."""
    n = len(points)
    sample = points[np.linspace(0, n - 1, num=min(n, 512)).astype(np.int64)]
    per_point = float(np.mean(tree.query_ball_point(sample, reach, return_length=True)))
    size = int(np.clip(CHUNK_CANDIDATES / max(per_point, 1.0), 256, 500_000))
    return [(s, min(s + size, n)) for s in range(0, n, size)]


def _screen_impl(ci, cj, src, dst, same, centre, half, d_crs, out_i, out_j):
    """Candidate pairs whose boxes lie within ``d_crs``, as positions; returns how many.

    ``ci``, ``cj`` index ``src`` and ``dst``; with ``same`` only pairs ``i < j``
    are kept. The numba twin of the numpy screen in :func:`_screen_numpy`.
    """
    n = 0
    for k in range(ci.shape[0]):
        i = src[ci[k]]
        j = dst[cj[k]]
        if same and j <= i:
            continue
        gap_x = abs(centre[i, 0] - centre[j, 0]) - half[i, 0] - half[j, 0]
        gap_y = abs(centre[i, 1] - centre[j, 1]) - half[i, 1] - half[j, 1]
        if gap_x < 0.0:
            gap_x = 0.0
        if gap_y < 0.0:
            gap_y = 0.0
        if gap_x * gap_x + gap_y * gap_y <= d_crs * d_crs:
            out_i[n] = i
            out_j[n] = j
            n += 1
    return n


def _screen_numpy(ci, cj, src, dst, same, centre, half, d_crs):
    i = src[ci]
    j = dst[cj]
    if same:
        keep = j > i
        i, j = i[keep], j[keep]
    gap_x = np.abs(centre[i, 0] - centre[j, 0]) - half[i, 0] - half[j, 0]
    gap_y = np.abs(centre[i, 1] - centre[j, 1]) - half[i, 1] - half[j, 1]
    np.maximum(gap_x, 0.0, out=gap_x)
    np.maximum(gap_y, 0.0, out=gap_y)
    np.multiply(gap_x, gap_x, out=gap_x)
    np.multiply(gap_y, gap_y, out=gap_y)
    keep = gap_x + gap_y <= d_crs * d_crs
    return i[keep], j[keep]


def _screen(ci, cj, src, dst, same, centre, half, d_crs, engine):
    """Box-to-box distance: an exact lower bound of the geometry distance, cheap to compute.

    The squared distances are compared, so both engines keep the same pairs.
    """
    if engine == "numpy":
        return _screen_numpy(ci, cj, src, dst, same, centre, half, d_crs)
    out_i = np.empty(ci.shape[0], dtype=src.dtype)
    out_j = np.empty(ci.shape[0], dtype=dst.dtype)
    n = jit(_screen_impl)(ci, cj, src, dst, same, centre, half, d_crs, out_i, out_j)
    return out_i[:n].copy(), out_j[:n].copy()


def _measure_chunk(tree, src, dst, same, reach, context):
    geoms, centre, half, d_crs, scale, max_distance, engine = context
    local = cKDTree(centre[src])
    cand = local.sparse_distance_matrix(tree, reach, output_type="ndarray")
    ci, cj = cand["i"], cand["j"]
    del cand
    i, j = _screen(ci, cj, src, dst, same, centre, half, d_crs, engine)
    del ci, cj
    dist = shapely.distance(geoms[i], geoms[j])
    dist *= scale
    keep = dist <= max_distance
    # int32 positions halve the memory of the pairs (fewer than 2**31 units).
    return i[keep].astype(np.int32), j[keep].astype(np.int32), dist[keep]
