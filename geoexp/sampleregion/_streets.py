"""The sample city's street graph: a bent grid cut by a river, a rail line and an avenue.

The generator works on a small graph (node coordinates plus edges that know
their street and position along it) and turns it into segment geometries at
the end, so segments of one street share end points exactly and the network
is noded wherever streets meet.
"""

from __future__ import annotations

from dataclasses import dataclass

import geopandas as gpd
import numpy as np
import shapely
from scipy.sparse import coo_array
from scipy.sparse.csgraph import connected_components

from geoexp.sampleregion._settings import (
    _AVENUE,
    _BRIDGE,
    _GRID,
    _STUB,
    _SURNAMES,
    _TREES,
    AVENUE_NAME,
    CRS,
    ORIGIN,
    ROTATION,
)


@dataclass(frozen=True, eq=False)
class _Layout:
    nx: int
    ny: int
    xy: np.ndarray  # (ny * nx, 2) world coordinates of grid nodes, id = j * nx + i
    inside: np.ndarray  # (ny * nx,) grid node lies inside the city outline
    river: shapely.Polygon
    rail: shapely.LineString
    avenue: np.ndarray  # (2, 2) world coordinates of the avenue's far ends
    centre: np.ndarray  # (2,) world coordinates of downtown
    street_names: list[str]  # columns (avenues) first, then rows, then the diagonal
    bridge_streets: tuple[int, ...]
    rail_streets: tuple[int, ...]
    seeds_local: np.ndarray  # district seeds in the local frame


def _to_world(local: np.ndarray) -> np.ndarray:
    c, s = np.cos(ROTATION), np.sin(ROTATION)
    x, y = local[..., 0], local[..., 1]
    return np.stack([ORIGIN[0] + c * x - s * y, ORIGIN[1] + s * x + c * y], axis=-1)


def _spacings(rng: np.random.Generator, n: int) -> np.ndarray:
    # Blocks of 80-160 m, smaller downtown: the sorted sizes are dealt out by
    # (noisy) distance from the middle of the grid.
    sizes = np.sort(rng.uniform(80.0, 160.0, n))
    key = np.abs(np.arange(n) - (n - 1) / 2) + rng.normal(0.0, 3.0, n)
    out = np.empty(n)
    out[np.argsort(key, kind="stable")] = sizes
    return out


def _ordinal(k: int) -> str:
    suffix = "th" if 10 <= k % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(k % 10, "th")
    return f"{k}{suffix}"


def _row_names(n: int) -> list[str]:
    base = list(_TREES) + list(_SURNAMES)
    kinds = ("St", "Rd", "Ln", "Way")
    return [f"{base[k % len(base)]} {kinds[(k // len(base)) % len(kinds)]}" for k in range(n)]


def _layout(rng: np.random.Generator, target: int) -> _Layout:
    # Segments ~ 2 * nx * ny * 0.81 once the outline, the river, the rail and
    # missing links have taken their share (measured on the default city).
    ny = max(8, round(np.sqrt(target / (2 * 0.81) / 1.15)))
    nx = max(8, round(1.15 * ny))
    x = np.concatenate([[0.0], np.cumsum(_spacings(rng, nx - 1))])
    y = np.concatenate([[0.0], np.cumsum(_spacings(rng, ny - 1))])
    x -= x.mean()
    y -= y.mean()
    gx, gy = np.meshgrid(x, y)
    phase = rng.uniform(0.0, 2 * np.pi, 2)
    # A gentle warp bends every street a few degrees; the jitter roughens it.
    lx = gx + 30.0 * np.sin(2 * np.pi * gy / 2300.0 + phase[0]) + rng.normal(0.0, 2.5, gx.shape)
    ly = gy + 24.0 * np.sin(2 * np.pi * gx / 2700.0 + phase[1]) + rng.normal(0.0, 2.5, gy.shape)
    local = np.stack([lx.ravel(), ly.ravel()], axis=1)
    half_w, half_h = x.max(), y.max()

    # Rounded, lobed outline (a superellipse with a wobble) instead of a rectangle.
    theta = np.arctan2(local[:, 1] / half_h, local[:, 0] / half_w)
    wobble = 1.0 + 0.06 * np.sin(3 * theta + rng.uniform(0, 2 * np.pi))
    r4 = (local[:, 0] / half_w) ** 4 + (local[:, 1] / half_h) ** 4
    inside = r4**0.25 <= 1.01 * wobble

    # River: a meandering band roughly west-east, south of the middle.
    rx = np.linspace(-half_w - 400.0, half_w + 400.0, 240)
    ry = (
        -0.18 * half_h
        + 0.06 * rx
        + 120.0 * np.sin(2 * np.pi * rx / 1900.0 + rng.uniform(0, 2 * np.pi))
        + 45.0 * np.sin(2 * np.pi * rx / 700.0 + rng.uniform(0, 2 * np.pi))
    )
    river = shapely.buffer(
        shapely.linestrings(_to_world(np.stack([rx, ry], axis=1))), 32.0, cap_style="flat"
    )
    # Rail: a smooth curve across the north of the city.
    tx = np.linspace(-half_w - 500.0, half_w + 500.0, 80)
    ty = 0.45 * half_h - 0.12 * tx + 0.35 * half_h * (tx / half_w) ** 2
    rail = shapely.linestrings(_to_world(np.stack([tx, ty], axis=1)))
    # Diagonal avenue, south-west to north-east through downtown.
    avenue_local = np.array([[-1.3 * half_w, -1.15 * half_h], [1.3 * half_w, 1.05 * half_h]])

    # District seeds on a jittered 3 x 3 lattice (the north-east one unused).
    fx, fy = np.meshgrid([-0.62, 0.0, 0.62], [-0.62, 0.0, 0.62])
    seeds = np.stack([fx.ravel() * half_w, fy.ravel() * half_h], axis=1)
    seeds += rng.uniform(-0.1, 0.1, seeds.shape) * [half_w, half_h]

    names = [f"{_ordinal(i + 1)} Ave" for i in range(nx)] + _row_names(ny) + [AVENUE_NAME]
    avenue_id = nx + ny
    return _Layout(
        nx=nx,
        ny=ny,
        xy=_to_world(local),
        inside=inside,
        river=river,
        rail=rail,
        avenue=_to_world(avenue_local),
        centre=_to_world(np.array([0.0, 0.0])),
        street_names=names,
        # columns spread across the city, plus the diagonal avenue
        bridge_streets=(round(0.2 * nx), round(0.47 * nx), round(0.8 * nx), avenue_id),
        rail_streets=(round(0.13 * nx), round(0.55 * nx), round(0.9 * nx), avenue_id),
        seeds_local=seeds,
    )


# ----------------------------------------------------------------------------
# the street graph


@dataclass(frozen=True)
class _Graph:
    xy: np.ndarray  # (n_nodes, 2)
    a: np.ndarray  # edge start node, in the street's direction of travel
    b: np.ndarray  # edge end node
    street: np.ndarray  # street id of the edge
    order: np.ndarray  # position of the edge along its street
    kind: np.ndarray  # _GRID, _AVENUE, _BRIDGE or _STUB

    def take(self, keep: np.ndarray) -> _Graph:
        return _Graph(
            self.xy,
            self.a[keep],
            self.b[keep],
            self.street[keep],
            self.order[keep],
            self.kind[keep],
        )

    def extend(self, a, b, street, order, kind) -> _Graph:
        return _Graph(
            self.xy,
            np.concatenate([self.a, a]),
            np.concatenate([self.b, b]),
            np.concatenate([self.street, street]),
            np.concatenate([self.order, order]),
            np.concatenate([self.kind, kind]),
        )

    def lines(self) -> np.ndarray:
        coords = np.stack([self.xy[self.a], self.xy[self.b]], axis=1)
        return shapely.linestrings(coords)


def _grid_graph(layout: _Layout) -> _Graph:
    nx, ny = layout.nx, layout.ny
    node = np.arange(nx * ny).reshape(ny, nx)
    ii, jj = np.meshgrid(np.arange(nx), np.arange(ny))
    # rows (west to east) are streets nx + j; columns (south to north) are streets i
    ha, hb = node[:, :-1].ravel(), node[:, 1:].ravel()
    h_street, h_order = (nx + jj[:, :-1]).ravel(), ii[:, :-1].ravel()
    va, vb = node[:-1, :].ravel(), node[1:, :].ravel()
    v_street, v_order = ii[:-1, :].ravel(), jj[:-1, :].ravel()
    a = np.concatenate([ha, va])
    b = np.concatenate([hb, vb])
    keep = layout.inside[a] & layout.inside[b]
    return _Graph(
        xy=layout.xy.copy(),
        a=a[keep],
        b=b[keep],
        street=np.concatenate([h_street, v_street])[keep],
        order=np.concatenate([h_order, v_order]).astype(float)[keep],
        kind=np.full(int(keep.sum()), _GRID),
    )


def _add_avenue(g: _Graph, ends: np.ndarray, avenue_id: int) -> _Graph:
    """Split every edge the straight avenue crosses and thread the avenue through the splits."""
    p0, p1 = ends
    pa, pb = g.xy[g.a], g.xy[g.b]
    r = pb - pa
    s = p1 - p0
    denom = r[:, 0] * s[1] - r[:, 1] * s[0]
    q = p0 - pa
    with np.errstate(divide="ignore", invalid="ignore"):
        t = (q[:, 0] * s[1] - q[:, 1] * s[0]) / denom  # along the edge
        u = (q[:, 0] * r[:, 1] - q[:, 1] * r[:, 0]) / denom  # along the avenue
    hit = (denom != 0) & (t >= 0) & (t <= 1) & (u >= 0) & (u <= 1)
    hit_idx = np.flatnonzero(hit)
    # A crossing next to a node that lies within 8 m of the avenue's line is
    # moved onto that node: every crossing around such a node then lands on it,
    # so the avenue neither leaves slivers nor runs along a piece of a street.
    rel = g.xy - p0
    off_line = np.abs(rel[:, 0] * s[1] - rel[:, 1] * s[0]) / np.hypot(*s)
    near_a = off_line[g.a[hit_idx]] < 8.0
    near_b = ~near_a & (off_line[g.b[hit_idx]] < 8.0)
    split = ~near_a & ~near_b
    n0 = len(g.xy)
    new_xy = pa[hit_idx[split]] + t[hit_idx[split], None] * r[hit_idx[split]]
    xy = np.concatenate([g.xy, new_xy])
    cross_node = np.where(near_a, g.a[hit_idx], g.b[hit_idx])
    cross_node[split] = n0 + np.arange(int(split.sum()))

    # Replace each split edge (a, b) by (a, P) and (P, b).
    sp = hit_idx[split]
    keep = np.ones(len(g.a), bool)
    keep[sp] = False
    pnode = cross_node[split]
    g2 = _Graph(xy, g.a[keep], g.b[keep], g.street[keep], g.order[keep], g.kind[keep])
    g2 = g2.extend(
        np.concatenate([g.a[sp], pnode]),
        np.concatenate([pnode, g.b[sp]]),
        np.concatenate([g.street[sp], g.street[sp]]),
        np.concatenate([g.order[sp], g.order[sp] + 0.5]),
        np.full(2 * len(sp), _GRID),
    )
    # Thread the avenue through its crossings in order along it.
    order = np.argsort(u[hit_idx], kind="stable")
    chain = cross_node[order]
    chain = chain[np.concatenate([[True], chain[1:] != chain[:-1]])]
    _, first = np.unique(chain, return_index=True)
    chain = chain[np.sort(first)]
    m = len(chain) - 1
    return g2.extend(
        chain[:-1],
        chain[1:],
        np.full(m, avenue_id),
        np.arange(m, dtype=float),
        np.full(m, _AVENUE),
    )


def _cross_barrier(
    g: _Graph, barrier: shapely.Geometry, node_clear: float, crossing_streets: tuple[int, ...]
) -> tuple[np.ndarray, list[tuple[int, int, int, float]]]:
    """Edges a barrier removes, and the bridges that carry the chosen streets across it."""
    pts = shapely.points(g.xy)
    node_hit = shapely.dwithin(pts, barrier, node_clear)
    affected = node_hit[g.a] | node_hit[g.b] | shapely.intersects(g.lines(), barrier)
    bridges = []
    for street in crossing_streets:
        idx = np.flatnonzero(g.street == street)
        idx = idx[np.argsort(g.order[idx], kind="stable")]
        hits = np.flatnonzero(affected[idx])
        if len(hits) == 0:
            continue
        # the first run of affected edges along the street
        p0 = hits[0]
        p1 = p0
        while p1 + 1 < len(idx) and affected[idx[p1 + 1]]:
            p1 += 1
        if p0 == 0 or p1 == len(idx) - 1:
            continue
        start, end = g.a[idx[p0]], g.b[idx[p1]]
        if node_hit[start] or node_hit[end]:
            continue
        bridges.append((int(start), int(end), int(street), float(g.order[idx[p0]])))
    return affected, bridges


def _street_graph(layout: _Layout, rng: np.random.Generator) -> _Graph:
    avenue_id = layout.nx + layout.ny
    g = _grid_graph(layout)
    g = _add_avenue(g, layout.avenue, avenue_id)

    river_hit, river_bridges = _cross_barrier(g, layout.river, 10.0, layout.bridge_streets)
    rail_hit, rail_bridges = _cross_barrier(g, layout.rail, 12.0, layout.rail_streets)
    bridges = np.array(river_bridges + rail_bridges, dtype=float).reshape(-1, 4)
    g = g.take(~(river_hit | rail_hit))
    g = g.extend(
        bridges[:, 0].astype(np.int64),
        bridges[:, 1].astype(np.int64),
        bridges[:, 2].astype(np.int64),
        bridges[:, 3],
        np.full(len(bridges), _BRIDGE),
    )

    # Missing links and dead ends on ordinary grid streets.
    draw = rng.random(len(g.a))
    grid = g.kind == _GRID
    missing = grid & (draw < 0.035)
    stub = grid & (draw >= 0.035) & (draw < 0.06)
    frac = rng.uniform(0.35, 0.6, len(g.a))
    from_a = rng.random(len(g.a)) < 0.5
    sidx = np.flatnonzero(stub)
    pa, pb = g.xy[g.a[sidx]], g.xy[g.b[sidx]]
    fa = from_a[sidx]
    base = np.where(fa[:, None], pa, pb)
    other = np.where(fa[:, None], pb, pa)
    tip = base + frac[sidx, None] * (other - base)
    tip_node = len(g.xy) + np.arange(len(sidx))
    new_a = np.where(fa, g.a[sidx], tip_node)
    new_b = np.where(fa, tip_node, g.b[sidx])
    g = _Graph(np.concatenate([g.xy, tip]), g.a, g.b, g.street, g.order, g.kind)
    g = g.take(~(missing | stub)).extend(
        new_a, new_b, g.street[sidx], g.order[sidx], np.full(len(sidx), _STUB)
    )

    # Streets that reach the edge of town sometimes run on as dead ends.
    g = _edge_stubs(g, layout, rng)

    # Keep the largest connected piece so that every segment can be reached.
    n = len(g.xy)
    adj = coo_array((np.ones(len(g.a)), (g.a, g.b)), shape=(n, n))
    _, label = connected_components(adj, directed=False)
    used = np.zeros(n, bool)
    used[g.a] = True
    used[g.b] = True
    sizes = np.bincount(label[used], minlength=label.max() + 1)
    return g.take(label[g.a] == np.argmax(sizes))


def _edge_stubs(g: _Graph, layout: _Layout, rng: np.random.Generator) -> _Graph:
    nx, ny = layout.nx, layout.ny
    node = np.arange(nx * ny).reshape(ny, nx)
    ii, jj = np.meshgrid(np.arange(nx), np.arange(ny))
    inside = layout.inside.reshape(ny, nx)
    ends = np.zeros(len(g.xy), bool)
    ends[g.a] = True
    ends[g.b] = True
    present = ends[: nx * ny].reshape(ny, nx)
    new_a: list[np.ndarray] = []
    new_b: list[np.ndarray] = []
    street: list[np.ndarray] = []
    order: list[np.ndarray] = []
    tips: list[np.ndarray] = []
    # (di, dj): direction of travel outwards; the stub continues the street
    for di, dj in ((1, 0), (-1, 0), (0, 1), (0, -1)):
        back = np.zeros((ny, nx), bool)
        out = np.ones((ny, nx), bool)  # the grid's own border counts as outside
        sl_i = slice(max(0, -di), nx - max(0, di))
        sl_j = slice(max(0, -dj), ny - max(0, dj))
        bl_i = slice(max(0, di), nx - max(0, -di))
        bl_j = slice(max(0, dj), ny - max(0, -dj))
        # out-neighbour outside the outline, back-neighbour inside
        out[sl_j, sl_i] = ~inside[
            slice(sl_j.start + dj, sl_j.stop + dj), slice(sl_i.start + di, sl_i.stop + di)
        ]
        back[bl_j, bl_i] = inside[
            slice(bl_j.start - dj, bl_j.stop - dj), slice(bl_i.start - di, bl_i.stop - di)
        ]
        src = present & inside & out & back
        pick = src & (rng.random((ny, nx)) < 0.3)
        s_i, s_j = ii[pick], jj[pick]
        here = layout.xy[node[s_j, s_i]]
        prev = layout.xy[node[s_j - dj, s_i - di]]
        step = here - prev
        step /= np.hypot(step[:, 0], step[:, 1])[:, None]
        tip = here + rng.uniform(40.0, 80.0, len(s_i))[:, None] * step
        tip_id = len(g.xy) + sum(len(t) for t in tips) + np.arange(len(s_i))
        st = np.where(di != 0, nx + s_j, s_i)
        pos = np.where(di != 0, s_i, s_j).astype(float)
        forward = (di + dj) > 0
        new_a.append(node[s_j, s_i] if forward else tip_id)
        new_b.append(tip_id if forward else node[s_j, s_i])
        street.append(st)
        order.append(pos if forward else pos - 1)
        tips.append(tip)
    g = _Graph(np.concatenate([g.xy, *tips]), g.a, g.b, g.street, g.order, g.kind)
    # avoid stubs that run into the river or over the rail
    cand = _Graph(
        g.xy,
        np.concatenate(new_a),
        np.concatenate(new_b),
        np.concatenate(street),
        np.concatenate(order),
        np.full(sum(len(t) for t in tips), _STUB),
    )
    lines = cand.lines()
    ok = ~shapely.dwithin(lines, layout.river, 10.0) & ~shapely.dwithin(lines, layout.rail, 12.0)
    cand = cand.take(ok)
    return g.extend(cand.a, cand.b, cand.street, cand.order, cand.kind)


# ----------------------------------------------------------------------------
# from graph to segments


def _segments_from_graph(g: _Graph, layout: _Layout) -> gpd.GeoDataFrame:
    """Merge edges into segments that run between consecutive intersections."""
    srt = np.lexsort((g.order, g.street))
    a, b, street = g.a[srt], g.b[srt], g.street[srt]
    n = len(g.xy)
    degree = np.bincount(np.concatenate([a, b]), minlength=n)
    # distinct streets meeting at each node, and for each (node, street) the
    # lowest-numbered other street there: the cross street named in descriptions
    pairs = np.unique(np.stack([np.concatenate([a, b]), np.concatenate([street, street])]), axis=1)
    pn, ps = pairs
    n_streets = np.bincount(pn, minlength=n)
    first_pos = np.searchsorted(pn, np.arange(n))
    first = np.full(n, -1)
    second = np.full(n, -1)
    has = n_streets > 0
    first[has] = ps[first_pos[has]]
    two = n_streets > 1
    second[two] = ps[first_pos[two] + 1]

    def cross(node: np.ndarray, st: np.ndarray) -> np.ndarray:
        other = np.where(first[node] != st, first[node], second[node])
        return np.where(degree[node] == 1, -2, other)  # -2: dead end

    starts = np.ones(len(a), bool)
    starts[1:] = (street[1:] != street[:-1]) | (a[1:] != b[:-1]) | (n_streets[a[1:]] >= 2)
    seg = np.cumsum(starts) - 1
    n_seg = int(seg[-1]) + 1
    first_edge = np.flatnonzero(starts)
    last_edge = np.concatenate([first_edge[1:] - 1, [len(a) - 1]])

    # vertex sequence of each segment: its first start node, then every end node
    vert_node = np.concatenate([a[first_edge], b])
    vert_seg = np.concatenate([seg[first_edge], seg])
    vert_rank = np.concatenate([2 * first_edge, 2 * np.arange(len(a)) + 1])
    o = np.lexsort((vert_rank, vert_seg))
    geometry = shapely.linestrings(g.xy[vert_node[o]], indices=vert_seg[o])

    seg_street = street[first_edge]
    from_id = cross(a[first_edge], seg_street)
    to_id = cross(b[last_edge], seg_street)
    names = np.array(layout.street_names + ["dead end", "?"], dtype=object)
    street_name = names[seg_street]
    from_name = names[from_id]  # -2 -> "dead end", -1 -> "?"
    to_name = names[to_id]
    lone = (from_id == -1) | (to_id == -1)
    if lone.any():  # a run end with no cross street would be a generator bug
        raise RuntimeError(f"{int(lone.sum())} segments end where no other street meets them")
    dead_from = from_id == -2
    dead_to = to_id == -2
    # a dead end is always described from the street it leaves
    start_name = np.where(dead_from, to_name, from_name)
    description = np.where(
        dead_from | dead_to,
        street_name + " from " + start_name + " to dead end",
        street_name + " between " + from_name + " and " + to_name,
    )
    return gpd.GeoDataFrame(
        {
            "segment_id": [f"S{k:05d}" for k in range(1, n_seg + 1)],
            "street": street_name,
            "from_street": from_name,
            "to_street": to_name,
            "description": description,
            "length_m": shapely.length(geometry),
        },
        geometry=geometry,
        crs=CRS,
    )


# ----------------------------------------------------------------------------
# districts and parcels
