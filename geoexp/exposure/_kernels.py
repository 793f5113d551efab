"""Scatter kernels: exposure conditions of many draws, touching only treated units' neighbours.

Two engines compute exactly the same integers: a numba loop (fast, the
default when numba imports) and a pure-numpy twin that processes a chunk of
draws at once by sorting (draw, neighbour, distance) triples. Both visit, for
each draw, only the graph rows of that draw's treated units, so the work per
draw is proportional to the treated units' neighbour lists, never to the
number of units.
"""

from __future__ import annotations

import numpy as np

try:  # numba is a core dependency, but the numpy twin keeps geoexp usable without it
    import numba

    HAVE_NUMBA = True
except ImportError:  # pragma: no cover - exercised only where numba is missing
    HAVE_NUMBA = False

# Largest number of (draw, neighbour) triples the numpy twin holds at once.
_TRIPLES_PER_CHUNK = 4_000_000


def resolve_engine(engine: str) -> str:
    """Return "numba" or "numpy" for an engine request ("auto", "numba", "numpy")."""
    if engine == "auto":
        return "numba" if HAVE_NUMBA else "numpy"
    if engine == "numba" and not HAVE_NUMBA:
        raise ImportError("engine='numba' needs the numba package; use engine='numpy'")
    if engine not in ("numba", "numpy"):
        raise ValueError(f"engine must be 'auto', 'numba' or 'numpy', got {engine!r}")
    return engine


def _scatter_numba_impl(
    d_indptr, d_indices, g_indptr, g_indices, g_dist, edges, counts, cov, cov_sums, cond_counts
):
    n_units = counts.shape[0]
    n_edges = edges.shape[0]
    reach = edges[n_edges - 1]
    n_cov = cov.shape[1]
    track = cond_counts.shape[0] > 0
    nearest = np.full(n_units, np.inf)
    is_treated = np.zeros(n_units, np.bool_)
    touched = np.empty(n_units, np.int64)
    for r in range(d_indptr.shape[0] - 1):
        start, stop = d_indptr[r], d_indptr[r + 1]
        for a in range(start, stop):
            is_treated[d_indices[a]] = True
        n_touched = 0
        for a in range(start, stop):
            t = d_indices[a]
            for b in range(g_indptr[t], g_indptr[t + 1]):
                j = g_indices[b]
                dist = g_dist[b]
                if is_treated[j] or dist > reach:
                    continue
                if nearest[j] == np.inf:
                    touched[n_touched] = j
                    n_touched += 1
                if dist < nearest[j]:
                    nearest[j] = dist
        for a in range(start, stop):
            t = d_indices[a]
            counts[t, 0] += 1
            if track:
                cond_counts[r, 0] += 1
                for q in range(n_cov):
                    cov_sums[r, 0, q] += cov[t, q]
            is_treated[t] = False
        for s in range(n_touched):
            j = touched[s]
            c = 1
            for e in range(n_edges):
                if edges[e] < nearest[j]:
                    c += 1
            counts[j, c] += 1
            if track:
                cond_counts[r, c] += 1
                for q in range(n_cov):
                    cov_sums[r, c, q] += cov[j, q]
            nearest[j] = np.inf


if HAVE_NUMBA:
    _scatter_numba = numba.njit(cache=True, nogil=True)(_scatter_numba_impl)


def _gather_rows(indptr: np.ndarray, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Positions into a CSR's data for the given rows, and the row-entry each came from."""
    starts = indptr[rows]
    lengths = indptr[rows + 1] - starts
    owner = np.repeat(np.arange(rows.size), lengths)
    offsets = np.arange(owner.size) - np.repeat(np.cumsum(lengths) - lengths, lengths)
    return starts[owner] + offsets, owner


def touched_conditions_numpy(
    d_indptr: np.ndarray,
    d_indices: np.ndarray,
    g_indptr: np.ndarray,
    g_indices: np.ndarray,
    g_dist: np.ndarray,
    edges: np.ndarray,
    n_units: int,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Untreated units reached by a chunk of draws: (draw, unit, condition code), unique pairs.

    Draws are rows of the CSR ``(d_indptr, d_indices)``, local to this chunk.
    """
    n_draws = d_indptr.size - 1
    draw_of = np.repeat(np.arange(n_draws, dtype=np.int64), np.diff(d_indptr))
    data_pos, owner = _gather_rows(g_indptr, d_indices.astype(np.int64))
    draw = draw_of[owner]
    unit = g_indices[data_pos].astype(np.int64)
    dist = g_dist[data_pos]
    keep = dist <= edges[-1]
    draw, unit, dist = draw[keep], unit[keep], dist[keep]
    key = draw * n_units + unit
    # nearest treated unit per (draw, unit): sort by key, take the minimum of each run
    order = np.argsort(key, kind="stable")
    key, dist = key[order], dist[order]
    if key.size:
        starts = np.flatnonzero(np.concatenate(([True], key[1:] != key[:-1])))
        dist = np.minimum.reduceat(dist, starts)
        key = key[starts]
    # drop the treated units themselves (they are "treated", whatever their neighbours)
    treated_key = np.sort(draw_of * n_units + d_indices)
    if treated_key.size and key.size:
        hit = np.minimum(np.searchsorted(treated_key, key), treated_key.size - 1)
        untreated = treated_key[hit] != key
        key, dist = key[untreated], dist[untreated]
    cond = (np.searchsorted(edges, dist, side="left") + 1).astype(np.int64)
    return key // n_units, key % n_units, cond


def _scatter_numpy(
    d_indptr, d_indices, g_indptr, g_indices, g_dist, edges, counts, cov, cov_sums, cond_counts
):
    n_units, n_cond = counts.shape
    n_draws = d_indptr.size - 1
    if n_draws == 0 or d_indices.size == 0:
        return
    # work per draw = sum of its treated units' degrees; chunks hold a bounded number of triples
    work = np.concatenate(([0], np.cumsum(np.diff(g_indptr)[d_indices])))
    per_draw = work[d_indptr[1:]] - work[d_indptr[:-1]]
    cum = np.cumsum(per_draw)
    start = 0
    track = cond_counts.shape[0] > 0
    while start < n_draws:
        base = cum[start - 1] if start else 0
        stop = int(np.searchsorted(cum, base + _TRIPLES_PER_CHUNK, side="right"))
        stop = max(stop, start + 1)
        sl = slice(d_indptr[start], d_indptr[stop])
        sub_indptr = d_indptr[start : stop + 1] - d_indptr[start]
        sub_indices = d_indices[sl]
        draw, unit, cond = touched_conditions_numpy(
            sub_indptr, sub_indices, g_indptr, g_indices, g_dist, edges, n_units
        )
        counts += np.bincount(unit * n_cond + cond, minlength=n_units * n_cond).reshape(
            n_units, n_cond
        )
        counts[:, 0] += np.bincount(sub_indices, minlength=n_units)
        if track:
            n_sub = stop - start
            tdraw = np.repeat(np.arange(n_sub), np.diff(sub_indptr))
            cond_counts[start:stop] += np.bincount(
                draw * n_cond + cond, minlength=n_sub * n_cond
            ).reshape(n_sub, n_cond)
            cond_counts[start:stop, 0] += np.bincount(tdraw, minlength=n_sub)
            for q in range(cov.shape[1]):
                cov_sums[start:stop, :, q] += np.bincount(
                    draw * n_cond + cond, weights=cov[unit, q], minlength=n_sub * n_cond
                ).reshape(n_sub, n_cond)
                cov_sums[start:stop, 0, q] += np.bincount(
                    tdraw, weights=cov[sub_indices, q], minlength=n_sub
                )
        start = stop


def scatter_counts(
    d_indptr: np.ndarray,
    d_indices: np.ndarray,
    g_indptr: np.ndarray,
    g_indices: np.ndarray,
    g_dist: np.ndarray,
    edges: np.ndarray,
    n_units: int,
    cov: np.ndarray | None = None,
    *,
    engine: str = "auto",
) -> tuple[np.ndarray, np.ndarray | None, np.ndarray | None]:
    """Count, over a chunk of draws, how often each unit is treated or in each band.

    Returns ``counts`` (n_units, K+2) int64 with the pure-control column left
    at zero (it is the remainder, filled by the caller), and when ``cov`` is
    given, per-draw condition sizes (R, K+2) and covariate sums (R, K+2, q)
    for the conditions other than pure control.
    """
    n_cond = edges.size + 2
    counts = np.zeros((n_units, n_cond), dtype=np.int64)
    n_draws = d_indptr.size - 1
    if cov is None:
        cov_arr = np.zeros((n_units, 0))
        cov_sums = np.zeros((0, n_cond, 0))
        cond_counts = np.zeros((0, n_cond), dtype=np.int64)
    else:
        cov_arr = np.ascontiguousarray(cov, dtype=np.float64)
        cov_sums = np.zeros((n_draws, n_cond, cov_arr.shape[1]))
        cond_counts = np.zeros((n_draws, n_cond), dtype=np.int64)
    args = (
        np.ascontiguousarray(d_indptr, dtype=np.int64),
        np.ascontiguousarray(d_indices, dtype=np.int64),
        np.ascontiguousarray(g_indptr, dtype=np.int64),
        np.ascontiguousarray(g_indices, dtype=np.int64),
        np.ascontiguousarray(g_dist, dtype=np.float64),
        np.ascontiguousarray(edges, dtype=np.float64),
        counts,
        cov_arr,
        cov_sums,
        cond_counts,
    )
    if resolve_engine(engine) == "numba":
        _scatter_numba(*args)
    else:
        _scatter_numpy(*args)
    if cov is None:
        return counts, None, None
    return counts, cond_counts, cov_sums
