"""Distances along the street network built from the segment layer itself.

Nodes are segment end points, joined when closer than the snap tolerance
(transitively: a chain of close points becomes one node). Each segment is an
edge weighted by its length. The distance between two segments is the
shortest walk between them: the minimum over their end points of the
node-to-node shortest path (Dijkstra, 1959), 0 when they share a node.

Two engines give identical pairs and distances:

* ``numba``: for each segment, a Dijkstra search seeded at both of its end
  points that stops at the distance limit and reports only the segments it
  reaches (binary heap; work proportional to the pairs found);
* ``numpy``: :func:`scipy.sparse.csgraph.dijkstra` with ``limit=`` from the end
  points of a chunk of segments, keeping only the finite entries.

Both measure every pair from the segment with the lower position, so that
the floating-point sums along a path are done in the same order.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numpy as np
import scipy.sparse as sp
import shapely
from scipy.sparse.csgraph import connected_components, dijkstra
from scipy.spatial import cKDTree

from geoexp._engine import Engine, compile_kernels, compute_threads, resolve_engine

_KERNELS = ("_sources", "_grow_int", "_grow_float", "_bounded_walks")
# Dense Dijkstra rows per chunk in the numpy engine (rows x nodes float64 values).
NUMPY_CHUNK_VALUES = 8_000_000


class NotLinesError(Exception):
    """Raised with the positions of geometries that are not (multi)line strings."""

    def __init__(self, positions: np.ndarray):
        super().__init__("not lines")
        self.positions = positions


def street_network(geoms: np.ndarray, scale: float, snap_tolerance: float) -> dict:
    """Nodes and edges of the network formed by the segments.

    Returns a dict with ``seg_node`` (n, 2) end-point node of each segment,
    ``n_nodes``, and the symmetric weighted node graph as CSR
    (``adj_ptr``, ``adj_node``, ``adj_w``, metres) with the shortest of any
    parallel segments kept.
    """
    geoms = _as_lines(geoms)
    n = len(geoms)
    counts = shapely.get_num_coordinates(geoms)
    coords = shapely.get_coordinates(geoms)
    last = np.cumsum(counts) - 1
    ends = np.concatenate([coords[last - counts + 1], coords[last]])  # starts, then ends
    tol = snap_tolerance / scale
    if tol > 0 and n:
        close = cKDTree(ends).query_pairs(tol, output_type="ndarray")
    else:
        close = np.empty((0, 2), dtype=np.int64)
    if tol <= 0 or not n:
        # Without a tolerance only identical coordinates meet.
        _, label = np.unique(ends, axis=0, return_inverse=True)
        n_nodes = int(label.max()) + 1 if n else 0
    else:
        link = sp.coo_array(
            (np.ones(len(close), dtype=np.int8), (close[:, 0], close[:, 1])), shape=(2 * n, 2 * n)
        )
        n_nodes, label = connected_components(link, directed=False)
    label = label.astype(np.int64).ravel()
    seg_node = np.column_stack([label[:n], label[n:]])

    length = shapely.length(geoms) * scale
    u, v = seg_node[:, 0], seg_node[:, 1]
    edge = u != v
    lo, hi, w = np.minimum(u, v)[edge], np.maximum(u, v)[edge], length[edge]
    order = np.lexsort((w, hi, lo))
    lo, hi, w = lo[order], hi[order], w[order]
    first = np.ones(len(lo), dtype=bool)
    first[1:] = (lo[1:] != lo[:-1]) | (hi[1:] != hi[:-1])
    lo, hi, w = lo[first], hi[first], w[first]
    graph = sp.csr_array(
        sp.coo_array(
            (np.concatenate([w, w]), (np.concatenate([lo, hi]), np.concatenate([hi, lo]))),
            shape=(n_nodes, n_nodes),
        )
    )
    graph.sort_indices()
    return {
        "seg_node": seg_node,
        "n_nodes": int(n_nodes),
        "adj_ptr": graph.indptr.astype(np.int64),
        "adj_node": graph.indices.astype(np.int64),
        "adj_w": graph.data.astype(np.float64),
        "graph": graph,
    }


def _as_lines(geoms: np.ndarray) -> np.ndarray:
    kind = shapely.get_type_id(geoms)
    multi = kind == 5
    if multi.any():
        geoms = geoms.copy()
        geoms[multi] = shapely.line_merge(geoms[multi])
        kind = shapely.get_type_id(geoms)
    bad = np.flatnonzero(kind != 1)
    if bad.size:
        raise NotLinesError(bad)
    return geoms


def network_pairs(
    geoms: np.ndarray, max_distance: float, scale: float, snap_tolerance: float, engine: Engine
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Undirected pairs ``(i, j, metres)``, ``i < j``, with street distance <= ``max_distance``."""
    net = street_network(geoms, scale, snap_tolerance)
    n = len(geoms)
    if n < 2:
        return np.empty(0, np.int64), np.empty(0, np.int64), np.empty(0, np.float64)
    seg_node = net["seg_node"]
    # Node -> incident segments, ascending segment positions.
    node_of = seg_node.ravel()
    seg_of = np.repeat(np.arange(n, dtype=np.int64), 2)
    twice = seg_node[:, 0] == seg_node[:, 1]
    keep = ~np.repeat(twice, 2) | (np.arange(2 * n) % 2 == 0)
    node_of, seg_of = node_of[keep], seg_of[keep]
    order = np.lexsort((seg_of, node_of))
    inc_seg = seg_of[order]
    inc_ptr = np.zeros(net["n_nodes"] + 1, dtype=np.int64)
    np.cumsum(np.bincount(node_of, minlength=net["n_nodes"]), out=inc_ptr[1:])

    if resolve_engine(engine) == "numba":
        compile_kernels(globals(), _KERNELS)
        args = (seg_node, net["adj_ptr"], net["adj_node"], net["adj_w"], inc_ptr, inc_seg)
        # Each thread takes an interleaved share of blocks of sources, which
        # balances the work when the network is denser in one part. The kernel
        # releases the GIL, so these threads run in parallel, one per core allowed.
        block = 2048
        starts = np.arange(0, n, block, dtype=np.int64)
        with compute_threads() as n_threads:
            shares = [starts[k::n_threads] for k in range(n_threads)]
            work = [
                lambda share=share: _bounded_walks(*args, share, block, float(max_distance))
                for share in shares
                if share.size
            ]
            if len(work) > 1:
                with ThreadPoolExecutor(len(work)) as pool:
                    parts = list(pool.map(lambda f: f(), work))
            else:
                parts = [f() for f in work]
        first, second, third = (np.concatenate([p[k] for p in parts]) for k in range(3))
        return first, second, third
    return _scipy_walks(seg_node, net["graph"], inc_ptr, inc_seg, float(max_distance))


def _scipy_walks(seg_node, graph, inc_ptr, inc_seg, limit):
    n = len(seg_node)
    n_nodes = graph.shape[0]
    # scipy aborts paths longer than its limit; widen it a hair and filter
    # exactly below, so a pair at exactly max_distance is never lost.
    search_limit = limit * (1.0 + 1e-9) + 1e-9
    rows_per_chunk = max(2, NUMPY_CHUNK_VALUES // max(n_nodes, 1))
    seg_step = max(1, rows_per_chunk // 2)
    out = []
    for start in range(0, n, seg_step):
        chunk = np.arange(start, min(start + seg_step, n))
        sources, where = np.unique(seg_node[chunk].ravel(), return_inverse=True)
        dist = dijkstra(graph, directed=False, indices=sources, limit=search_limit)
        src_row, node = np.nonzero(dist <= limit)
        reach = dist[src_row, node]
        del dist
        # Segment a of the chunk reaches node v from either end point (its rows).
        row_ptr = np.searchsorted(src_row, np.arange(len(sources) + 1))
        ent, at = _expand(row_ptr, where.ravel())
        a = np.repeat(chunk, 2)[ent]
        v = node[at]
        d = reach[at]
        # Node v -> segments b incident to it.
        ent, at = _expand(inc_ptr, v)
        b = inc_seg[at]
        a, d = a[ent], d[ent]
        keep = b > a
        a, b, d = a[keep], b[keep], d[keep]
        # Minimum over the end points of both segments.
        key = a * n + b
        order = np.lexsort((d, key))
        key, d = key[order], d[order]
        first = np.ones(len(key), dtype=bool)
        first[1:] = key[1:] != key[:-1]
        key, d = key[first], d[first]
        out.append((key // n, key % n, d))
    first = np.concatenate([o[0] for o in out])
    second = np.concatenate([o[1] for o in out])
    dist = np.concatenate([o[2] for o in out])
    return first, second, dist


def _expand(ptr: np.ndarray, keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """For each key k, every slot ptr[k]..ptr[k+1]: (which key, which slot), vectorised."""
    count = ptr[keys + 1] - ptr[keys]
    ent = np.repeat(np.arange(len(keys)), count)
    offset = np.arange(len(ent)) - np.repeat(np.cumsum(count) - count, count)
    return ent, ptr[keys][ent] + offset


# numba kernels, compiled on first use by network_pairs (see geoexp._engine)
def _bounded_walks(seg_node, adj_ptr, adj_node, adj_w, inc_ptr, inc_seg, starts, block, limit):
    n = seg_node.shape[0]
    n_nodes = adj_ptr.size - 1
    dist = np.full(n_nodes, np.inf)
    settled = np.zeros(n_nodes, dtype=np.bool_)
    touched = np.empty(n_nodes, dtype=np.int64)
    seen = np.full(n, -1, dtype=np.int64)
    heap_d = np.empty(64, dtype=np.float64)
    heap_v = np.empty(64, dtype=np.int64)
    cap = 64 + 8 * starts.size * block
    out_a = np.empty(cap, dtype=np.int64)
    out_b = np.empty(cap, dtype=np.int64)
    out_d = np.empty(cap, dtype=np.float64)
    m = 0
    for a in _sources(starts, block, n):
        n_touched = 0
        size = 0
        for end in range(2):
            s = seg_node[a, end]
            if dist[s] == np.inf:
                dist[s] = 0.0
                touched[n_touched] = s
                n_touched += 1
                heap_d[size] = 0.0
                heap_v[size] = s
                size += 1
        while size > 0:
            # Pop the minimum (lazy deletion: stale entries are skipped).
            d = heap_d[0]
            x = heap_v[0]
            size -= 1
            if size > 0:
                last_d = heap_d[size]
                last_v = heap_v[size]
                i = 0
                while True:
                    c = 2 * i + 1
                    if c >= size:
                        break
                    if c + 1 < size and heap_d[c + 1] < heap_d[c]:
                        c += 1
                    if heap_d[c] < last_d:
                        heap_d[i] = heap_d[c]
                        heap_v[i] = heap_v[c]
                        i = c
                    else:
                        break
                heap_d[i] = last_d
                heap_v[i] = last_v
            if settled[x] or d > dist[x]:
                continue
            settled[x] = True
            # Nodes settle in increasing distance, so the first visit of a
            # segment is at its nearest end point: that is its distance.
            for k in range(inc_ptr[x], inc_ptr[x + 1]):
                b = inc_seg[k]
                if b > a and seen[b] != a:
                    seen[b] = a
                    if m == cap:
                        cap *= 2
                        out_a = _grow_int(out_a, cap)
                        out_b = _grow_int(out_b, cap)
                        out_d = _grow_float(out_d, cap)
                    out_a[m] = a
                    out_b[m] = b
                    out_d[m] = d
                    m += 1
            for k in range(adj_ptr[x], adj_ptr[x + 1]):
                y = adj_node[k]
                nd = d + adj_w[k]
                if nd <= limit and nd < dist[y]:
                    if dist[y] == np.inf:
                        touched[n_touched] = y
                        n_touched += 1
                    dist[y] = nd
                    if size == heap_d.size:
                        heap_d = _grow_float(heap_d, 2 * size)
                        heap_v = _grow_int(heap_v, 2 * size)
                    i = size
                    size += 1
                    while i > 0:
                        parent = (i - 1) // 2
                        if heap_d[parent] > nd:
                            heap_d[i] = heap_d[parent]
                            heap_v[i] = heap_v[parent]
                            i = parent
                        else:
                            break
                    heap_d[i] = nd
                    heap_v[i] = y
        for t in range(n_touched):
            dist[touched[t]] = np.inf
            settled[touched[t]] = False
    return out_a[:m].copy(), out_b[:m].copy(), out_d[:m].copy()


def _sources(starts, block, n):
    out = np.empty(starts.size * block, dtype=np.int64)
    m = 0
    for s in starts:
        for a in range(s, min(s + block, n)):
            out[m] = a
            m += 1
    return out[:m]


def _grow_int(arr, cap):
    new = np.empty(cap, dtype=arr.dtype)
    new[: arr.size] = arr
    return new


def _grow_float(arr, cap):
    new = np.empty(cap, dtype=arr.dtype)
    new[: arr.size] = arr
    return new
