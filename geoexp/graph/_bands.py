"""Distance bands around a set of source units, reading only the sources' rows."""

from __future__ import annotations

import numpy as np

from geoexp.errors import InputError


def source_positions(sources, n: int) -> np.ndarray:
    """Positions from a boolean mask of length ``n`` or an array of positions."""
    arr = np.asarray(sources)
    if arr.dtype == bool:
        if arr.shape != (n,):
            raise InputError(
                f"a boolean mask of sources must have one entry per unit ({n}), got shape {arr.shape}"
            )
        return np.flatnonzero(arr)
    arr = arr.ravel()
    if arr.size == 0:
        return np.empty(0, dtype=np.int64)
    if arr.dtype.kind not in "iu":
        raise InputError(
            "sources must be integer positions or a boolean mask; "
            f"got an array of {arr.dtype} (use ExposureGraph.positions(ids) for unit ids)"
        )
    bad = arr[(arr < 0) | (arr >= n)]
    if bad.size:
        from geoexp.errors import describe_rows

        raise InputError(f"source positions out of range 0..{n - 1}: {describe_rows(bad.tolist())}")
    return np.unique(arr.astype(np.int64))


def nearest_distance(
    indptr: np.ndarray, indices: np.ndarray, distances: np.ndarray, rows: np.ndarray, n: int
) -> np.ndarray:
    """Distance from every unit to its nearest source other than itself (inf if none)."""
    start = indptr[rows]
    count = indptr[rows + 1] - start
    offset = np.arange(int(count.sum())) - np.repeat(np.cumsum(count) - count, count)
    slots = np.repeat(start, count) + offset
    out = np.full(n, np.inf)
    # The graph is symmetric, so row s holds the distance from each neighbour to s.
    np.minimum.at(out, indices[slots], distances[slots])
    return out


def band_mask(nearest: np.ndarray, rows: np.ndarray, low: float, high: float) -> np.ndarray:
    """Non-sources whose nearest-source distance d has low < d <= high ([0, high] when low == 0)."""
    inside = (nearest <= high) & ((nearest > low) if low > 0 else (nearest >= 0))
    inside[rows] = False
    return inside
