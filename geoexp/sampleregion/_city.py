"""The invented city of Quillmere: street segments, parcels, districts and incidents.

Quillmere is generated, not surveyed. Its streets form an irregular, gently bent
grid cut by a river (the Quill River, crossed by four bridges), a rail line (the
Tansy Line, crossed in four places) and a diagonal avenue. Every name in it is
invented. The city sits on the open South Atlantic in EPSG:32727 so that no real
place lies under it when it is drawn on a web map.

The generator works on a small street graph (node coordinates plus edges that
know their street and their position along it) and only turns it into
geometries at the end, so that segments of one street share endpoints exactly
and the network is noded wherever streets meet.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import shapely
from scipy.sparse import coo_array
from scipy.sparse.csgraph import connected_components

from geoexp._atomic import atomic_path
from geoexp._rng import as_seed_sequence
from geoexp.errors import InputError

__all__ = ["SampleRegion", "load_sample_region", "make_city"]

CRS = "EPSG:32727"
ORIGIN = (500_000.0, 6_700_000.0)
ROTATION = np.deg2rad(11.0)  # a tilted grid reads less like a chessboard on a map
DEFAULT_SEED = 20261202
SNAP_DISTANCE_M = 30.0
LAYERS = ("segments", "parcels", "districts", "incidents", "features")
DEFAULT_PATH = Path(__file__).resolve().parents[2] / "sample_regions" / "quillmere.gpkg"

LAND_USES = ("residential", "commercial", "mixed", "industrial", "park")
INCIDENT_TYPES = (
    "burglary",
    "robbery",
    "assault",
    "vehicle theft",
    "theft from vehicle",
    "vandalism",
    "disorder",
)
# Rows follow LAND_USES, columns INCIDENT_TYPES; invented mixes, not estimates.
_TYPE_MIX = np.array(
    [
        [0.28, 0.06, 0.10, 0.12, 0.20, 0.14, 0.10],
        [0.10, 0.14, 0.14, 0.08, 0.24, 0.12, 0.18],
        [0.18, 0.10, 0.12, 0.10, 0.22, 0.13, 0.15],
        [0.20, 0.05, 0.06, 0.22, 0.20, 0.20, 0.07],
        [0.02, 0.12, 0.18, 0.05, 0.10, 0.23, 0.30],
    ]
)
# Relative incident risk by the segment's land use (invented).
_USE_RISK = np.array([1.0, 1.6, 1.3, 0.8, 0.6])

_TREES = (
    "Alder Aspen Beech Birch Buckeye Catalpa Cedar Chestnut Cypress Dogwood Elm Fir "
    "Ginkgo Hawthorn Hazel Hickory Holly Hornbeam Ironwood Juniper Larch Laurel "
    "Linden Locust Magnolia Maple Mulberry Oak Olive Pine Poplar Quince Redbud Rowan "
    "Sassafras Spruce Sycamore Tamarack Walnut Willow Yew Acacia"
).split()
# Invented surnames (syllable compounds), used once the tree names run out.
_SURNAMES = (
    "Ollerbeck Tramwell Fessick Penderrow Quarrington Vellacott Brimsby Dawlock "
    "Ettermore Gorrinde Hollisant Jemmerly Kestlow Lumbridge Morrowen Nettlefold "
    "Orrinshaw Pellisfar Rendacott Sorrowby Thimbleton Umberlane Varrick Wendlemoor"
).split()
_DISTRICTS = (
    # laid out on a 3 x 3 lattice of seeds, west to east, south to north; the
    # north-east seed is dropped so that its neighbours share the corner
    ("Tansy Reach", "Brindle Park", "Saltvale"),
    ("Weavers Row", "Old Ferrow", "Marlin Docks"),
    ("Quill Heights", "Upper Quillmere", None),
)
AVENUE_NAME = "Ferrow Blvd"
RIVER_NAME = "Quill River"
RAIL_NAME = "Tansy Line"

# Street kinds of edges in the working graph.
_GRID, _AVENUE, _BRIDGE, _STUB = 0, 1, 2, 3


@dataclass(frozen=True, eq=False)
class SampleRegion:
    """An invented city to try geoexp on.

    Attributes
    ----------
    segments : geopandas.GeoDataFrame
        Street segments (LineString) between consecutive intersections, with
        columns ``segment_id``, ``street``, ``from_street``, ``to_street``,
        ``description``, ``district``, ``length_m``, ``land_use``,
        ``incidents_y1`` and ``incidents_y2``.
    parcels : geopandas.GeoDataFrame
        Parcels (Polygon) with ``parcel_id``, ``land_use``, ``district`` and
        ``address``.
    districts : geopandas.GeoDataFrame
        District polygons with column ``district``.
    incidents : geopandas.GeoDataFrame
        Incident points with ``incident_id``, ``date`` and ``incident_type``.
    features : geopandas.GeoDataFrame
        Context features (the river polygon and the rail line) with ``kind`` and
        ``name``.
    name : str
        Name of the city.
    path : str or None
        File the region was read from, or None if it was generated.
    """

    segments: gpd.GeoDataFrame
    parcels: gpd.GeoDataFrame
    districts: gpd.GeoDataFrame
    incidents: gpd.GeoDataFrame
    features: gpd.GeoDataFrame
    name: str = "Quillmere"
    path: str | None = None

    def __repr__(self) -> str:
        return (
            f"SampleRegion({self.name!r}: {len(self.segments):,} segments, "
            f"{len(self.parcels):,} parcels, {len(self.districts)} districts, "
            f"{len(self.incidents):,} incidents, path={self.path!r})"
        )


# ----------------------------------------------------------------------------
# public entry points


def make_city(seed: int = DEFAULT_SEED, *, n_segments_target: int = 3500) -> SampleRegion:
    """Generate the invented city of Quillmere from a seed.

    The same seed gives the same city on any machine: all randomness comes from
    child streams of one ``numpy.random.SeedSequence`` and nothing depends on
    set or dict iteration order.

    Parameters
    ----------
    seed : int, default 20261202
        Seed of the generator; the default reproduces the shipped file.
    n_segments_target : int, default 3500
        Approximate number of street segments; the grid is sized to land near it.

    Returns
    -------
    SampleRegion
        Layers in EPSG:32727 (metres). ``segments.incidents_y1`` and
        ``incidents_y2`` are the counts of 2024 and 2025 incidents whose nearest
        segment within 30 m is that segment, computed from the incident points
        themselves (so they agree exactly with snapping the ``incidents`` layer
        with a 30 m tolerance; points further than 30 m from every street are
        counted nowhere).
    """
    if int(n_segments_target) < 200:
        raise InputError(f"n_segments_target must be at least 200, got {n_segments_target}")
    streams = as_seed_sequence(seed).spawn(6)
    rngs = [np.random.default_rng(s) for s in streams]
    layout = _layout(rngs[0], int(n_segments_target))
    graph = _street_graph(layout, rngs[1])
    segments = _segments_from_graph(graph, layout)
    districts = _districts(layout, segments, rngs[2])
    # parcels keep clear of the avenue and the bridges as built (these do not
    # follow the grid's block edges), of the rail corridor and of the river
    seg_geom = segments.geometry.values
    off_grid = (segments["street"].to_numpy() == AVENUE_NAME) | shapely.intersects(
        seg_geom, shapely.union(layout.river, layout.rail)
    )
    carve = shapely.union_all(
        [
            shapely.buffer(shapely.union_all(seg_geom[off_grid]), 9.0),
            shapely.buffer(layout.rail, 14.0),
            layout.river,
        ]
    )
    parcels = _parcels(layout, rngs[3], carve)
    parcels["district"] = _district_of(parcels.geometry.representative_point(), districts)
    segments["district"] = _district_of(
        segments.geometry.interpolate(0.5, normalized=True), districts
    )
    segments["land_use"] = _segment_land_use(segments, parcels)
    incidents, y1, y2 = _incidents(segments, parcels, layout, rngs[4])
    segments["incidents_y1"] = y1
    segments["incidents_y2"] = y2
    features = gpd.GeoDataFrame(
        {"kind": ["river", "rail"], "name": [RIVER_NAME, RAIL_NAME]},
        geometry=[layout.river, layout.rail],
        crs=CRS,
    )
    return _normalise(
        SampleRegion(
            segments=segments,
            parcels=parcels,
            districts=districts,
            incidents=incidents,
            features=features,
        )
    )


def load_sample_region(path: str | Path | None = None) -> SampleRegion:
    """Load the Quillmere sample region.

    Parameters
    ----------
    path : str or pathlib.Path, optional
        A GeoPackage with the layers ``segments``, ``parcels``, ``districts``,
        ``incidents`` and ``features``. By default the file shipped in the
        repository's ``sample_regions`` folder; if that file is absent (geoexp
        installed without the repository) the city is regenerated with
        :func:`make_city` and the default seed, which gives the same data.

    Returns
    -------
    SampleRegion
    """
    if path is None:
        if not DEFAULT_PATH.exists():
            return make_city()
        path = DEFAULT_PATH
    path = Path(path)
    if not path.exists():
        raise InputError(f"sample region file {str(path)!r} does not exist")
    present = {name for name, _ in pyogrio.list_layers(path)}
    missing = [layer for layer in LAYERS if layer not in present]
    if missing:
        raise InputError(f"sample region file {str(path)!r} lacks the layers {missing}")
    frames = {
        layer: gpd.read_file(path, layer=layer, engine="pyogrio", fid_as_index=False)
        for layer in LAYERS
    }
    return _normalise(SampleRegion(**frames, path=str(path)))


def write_sample_region(region: SampleRegion, path: str | Path) -> Path:
    """Write ``region`` to a GeoPackage, one layer per frame, atomically."""
    path = Path(path)
    with atomic_path(path) as tmp:
        for layer in LAYERS:
            frame = getattr(region, layer)
            # no spatial index: it would double the file and the layers are small
            frame.to_file(tmp, layer=layer, driver="GPKG", engine="pyogrio", SPATIAL_INDEX="NO")
    return path


# ----------------------------------------------------------------------------
# layout: the shape of the city in a local frame, placed in the world


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
    present = np.zeros(len(g.xy), bool)
    present[g.a] = True
    present[g.b] = True
    present = present[: nx * ny].reshape(ny, nx)
    new_a, new_b, street, order, tips = [], [], [], [], []
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


def _districts(
    layout: _Layout, segments: gpd.GeoDataFrame, rng: np.random.Generator
) -> gpd.GeoDataFrame:
    hull = shapely.buffer(shapely.convex_hull(shapely.union_all(segments.geometry.values)), 40.0)
    names, seeds = [], []
    for row in range(3):
        for col in range(3):
            name = _DISTRICTS[row][col]
            if name is not None:
                names.append(name)
                seeds.append(layout.seeds_local[row * 3 + col])
    pts = shapely.multipoints(_to_world(np.array(seeds)))
    cells = shapely.get_parts(shapely.voronoi_polygons(pts, extend_to=hull, ordered=True))
    polys = shapely.intersection(cells, hull)
    return gpd.GeoDataFrame({"district": names}, geometry=polys, crs=CRS)


def _district_of(points: gpd.GeoSeries, districts: gpd.GeoDataFrame) -> np.ndarray:
    tree = shapely.STRtree(districts.geometry.values)
    # nearest polygon: distance 0 for points inside; ties on a shared border go
    # to the lower-numbered district
    idx = tree.query_nearest(np.asarray(points.values), all_matches=True)
    order = np.lexsort((idx[1], idx[0]))
    pi, di = idx[0][order], idx[1][order]
    keep = np.concatenate([[True], pi[1:] != pi[:-1]])
    out = np.empty(len(points), dtype=object)
    out[pi[keep]] = districts["district"].to_numpy()[di[keep]]
    return out


def _parcels(
    layout: _Layout, rng: np.random.Generator, carve: shapely.Geometry
) -> gpd.GeoDataFrame:
    nx, ny = layout.nx, layout.ny
    xy = layout.xy.reshape(ny, nx, 2)
    c00, c10 = xy[:-1, :-1], xy[:-1, 1:]
    c01, c11 = xy[1:, :-1], xy[1:, 1:]
    ci, cj = np.meshgrid(np.arange(nx - 1), np.arange(ny - 1))
    inside = layout.inside.reshape(ny, nx)
    cell_ok = (inside[:-1, :-1] & inside[:-1, 1:] & inside[1:, :-1] & inside[1:, 1:]).ravel()
    c00, c10, c01, c11 = (c.reshape(-1, 2)[cell_ok] for c in (c00, c10, c01, c11))
    ci, cj = ci.ravel()[cell_ok], cj.ravel()[cell_ok]
    width = 0.5 * (np.hypot(*(c10 - c00).T) + np.hypot(*(c11 - c01).T))
    height = 0.5 * (np.hypot(*(c01 - c00).T) + np.hypot(*(c11 - c10).T))
    centre = 0.25 * (c00 + c10 + c01 + c11)
    n_cell = len(ci)

    # Block land use: downtown and the avenue commercial/mixed, the rail side
    # industrial, a few whole blocks of park, houses elsewhere.
    cpts = shapely.points(centre)
    avenue = shapely.linestrings(layout.avenue)
    d_centre = np.hypot(*(centre - layout.centre).T)
    d_avenue = shapely.distance(cpts, avenue)
    d_rail = shapely.distance(cpts, layout.rail)
    p = np.tile([0.82, 0.06, 0.10, 0.02, 0.0], (n_cell, 1))
    p[d_rail < 220] = [0.35, 0.05, 0.10, 0.50, 0.0]
    p[d_avenue < 90] = [0.25, 0.40, 0.30, 0.05, 0.0]
    p[d_centre < 650] = [0.10, 0.50, 0.38, 0.02, 0.0]
    block_use = (rng.random(n_cell)[:, None] > np.cumsum(p, axis=1)).sum(axis=1)
    block_use = np.minimum(block_use, 3)
    block_use[rng.random(n_cell) < 0.04] = 4

    # Sub-divide each block bilinearly, 2-3 parcels per side, fronting the long sides.
    wide = width >= height
    n_long = np.where(np.maximum(width, height) > 115.0, 3, 2)
    nu = np.where(wide, n_long, 2)
    nv = np.where(wide, 2, n_long)
    park = block_use == 4
    nu[park] = 1
    nv[park] = 1
    parts = []
    for cu in (1, 2, 3):
        for cv in (1, 2, 3):
            sel = np.flatnonzero((nu == cu) & (nv == cv))
            if len(sel) == 0:
                continue
            uu, vv = np.meshgrid(np.arange(cu), np.arange(cv))
            uu, vv = uu.ravel(), vv.ravel()
            cell = np.repeat(sel, len(uu))
            u = np.tile(uu, len(sel))
            v = np.tile(vv, len(sel))
            corners = []
            for du, dv in ((0, 0), (1, 0), (1, 1), (0, 1), (0, 0)):
                s, t = ((u + du) / cu)[:, None], ((v + dv) / cv)[:, None]
                corners.append(
                    (1 - s) * (1 - t) * c00[cell]
                    + s * (1 - t) * c10[cell]
                    + s * t * c11[cell]
                    + (1 - s) * t * c01[cell]
                )
            parts.append((cell, u, v, np.stack(corners, axis=1)))
    cell = np.concatenate([q[0] for q in parts])
    u = np.concatenate([q[1] for q in parts])
    v = np.concatenate([q[2] for q in parts])
    quads = shapely.polygons(np.concatenate([q[3] for q in parts]))
    blocks = shapely.polygons(np.stack([c00, c10, c11, c01, c00], axis=1))
    # parcels stop 6 m short of the street centre lines
    inset = shapely.buffer(blocks, -6.0, join_style="mitre")
    shapes = shapely.intersection(quads, inset[cell])
    shapely.prepare(carve)
    cut = shapely.intersects(shapes, carve)
    shapes[cut] = shapely.difference(shapes[cut], carve)
    # keep the largest piece of a parcel the avenue cut in two
    parts_geom, part_of = shapely.get_parts(shapes, return_index=True)
    area = shapely.area(parts_geom)
    o = np.lexsort((-area, part_of))
    lead = o[np.concatenate([[True], part_of[o][1:] != part_of[o][:-1]])]
    parcel_geom = np.full(len(shapes), None, dtype=object)
    parcel_geom[part_of[lead]] = parts_geom[lead]
    ok = np.array([gm is not None for gm in parcel_geom]) & (
        shapely.area(parcel_geom.astype(object)) >= 150.0
    )

    # land use: mostly the block's, with a mix; river banks are parkland
    use = block_use[cell].copy()
    swap = rng.random(len(use)) < 0.12
    use[swap] = rng.choice(4, size=int(swap.sum()), p=[0.55, 0.2, 0.2, 0.05])
    use[park[cell]] = 4
    bank = shapely.dwithin(parcel_geom, layout.river, 35.0)
    use[bank] = 4

    # Addresses: hundreds by block along the fronting street, odd and even sides.
    w = wide[cell]
    front_street = np.where(
        w,
        layout.nx + cj[cell] + (v == nv[cell] - 1) * (nv[cell] > 1),
        ci[cell] + (u == nu[cell] - 1) * (nu[cell] > 1),
    )
    along = np.where(w, ci[cell], cj[cell])
    k = np.where(w, u, v)
    far_side = np.where(w, v == nv[cell] - 1, u == nu[cell] - 1) & np.where(
        w, nv[cell] > 1, nu[cell] > 1
    )
    number = 100 * (along + 1) + 4 * k + np.where(far_side, 2, 1)
    names = np.array(layout.street_names, dtype=object)
    address = np.char.add(np.char.add(number.astype(str), " "), names[front_street].astype(str))

    # number parcels block by block, then along and across the block
    keep = np.lexsort((u, v, cell))
    keep = keep[ok[keep]]
    frame = gpd.GeoDataFrame(
        {
            "parcel_id": [f"P{k_:05d}" for k_ in range(1, len(keep) + 1)],
            "land_use": np.array(LAND_USES, dtype=object)[use[keep]],
            "address": address[keep].astype(object),
        },
        geometry=parcel_geom[keep],
        crs=CRS,
    )
    return frame


def _segment_land_use(segments: gpd.GeoDataFrame, parcels: gpd.GeoDataFrame) -> np.ndarray:
    """Dominant land use of the parcels along each segment (nearest parcel if none)."""
    band = shapely.buffer(segments.geometry.values, 14.0, cap_style="flat")
    tree = shapely.STRtree(parcels.geometry.values)
    si, pi = tree.query(band, predicate="intersects")
    use_idx = pd.Categorical(parcels["land_use"], categories=LAND_USES).codes
    counts = np.zeros((len(segments), len(LAND_USES)))
    np.add.at(counts, (si, use_idx[pi]), 1.0)
    best = np.argmax(counts, axis=1)  # ties go to the earlier use in LAND_USES
    none = counts.sum(axis=1) == 0
    if none.any():
        near = tree.query_nearest(segments.geometry.values[none], all_matches=False)
        best[np.flatnonzero(none)[near[0]]] = use_idx[near[1]]
    return np.array(LAND_USES, dtype=object)[best]


# ----------------------------------------------------------------------------
# incidents


def _days(rng: np.random.Generator, year: int, n: int) -> np.ndarray:
    start = np.datetime64(f"{year}-01-01")
    n_days = int((np.datetime64(f"{year + 1}-01-01") - start).astype(int))
    doy = np.arange(n_days)
    # mild seasonality (about +-15%), peaking in July
    w = 1.0 + 0.15 * np.sin(2 * np.pi * (doy - 105) / 365.25)
    return start + rng.choice(n_days, size=n, p=w / w.sum())


def _incidents(
    segments: gpd.GeoDataFrame,
    parcels: gpd.GeoDataFrame,
    layout: _Layout,
    rng: np.random.Generator,
    per_year: float = 8000.0,
) -> tuple[gpd.GeoDataFrame, np.ndarray, np.ndarray]:
    geom = segments.geometry.values
    length = segments["length_m"].to_numpy()
    use = pd.Categorical(segments["land_use"], categories=LAND_USES).codes
    # Law of crime concentration: about half of all incidents on about 5% of
    # segments (Weisburd 2015, Criminology 53(2)) -- common practice. A
    # gamma-Poisson mixture gives it: each segment's risk is Gamma(shape 0.17)
    # times a length and land-use factor. The SAME risk drives both years, with
    # only a mild year-to-year wobble (Gamma(25) multipliers, CV 0.2), so hot
    # spots are stable across the two years.
    risk = rng.gamma(0.17, 1.0, len(geom)) * (length / length.mean()) ** 0.7 * _USE_RISK[use]
    # Hot spots cluster around a few invented activity centres (a smooth field of
    # Gaussian bumps, about 500 m across), so nearby segments are alike, as in
    # real cities: risk is up to e^1.5 (about 4.5) times higher at a centre, fading
    # with distance. Top 5% of segments then hold about 54% of incidents.
    mid = shapely.get_coordinates(shapely.line_interpolate_point(geom, 0.5, normalized=True))
    lo, hi = mid.min(axis=0), mid.max(axis=0)
    centres = lo + rng.uniform(0.1, 0.9, (6, 2)) * (hi - lo)
    d2 = ((mid[:, None, :] - centres[None, :, :]) ** 2).sum(axis=2)
    risk *= np.exp(1.5 * np.exp(-d2 / (2 * 500.0**2)).sum(axis=1))
    risk *= per_year / risk.sum()
    counts = [rng.poisson(risk * rng.gamma(25.0, 1 / 25.0, len(geom))) for _ in range(2)]

    seg_of = np.concatenate([np.repeat(np.arange(len(geom)), c) for c in counts])
    year = np.concatenate(
        [np.full(int(c.sum()), y) for c, y in zip(counts, (2024, 2025), strict=True)]
    )
    n_on = len(seg_of)
    frac = rng.uniform(0.05, 0.95, n_on)
    g = geom[seg_of]
    here = shapely.get_coordinates(shapely.line_interpolate_point(g, frac, normalized=True))
    ahead = shapely.get_coordinates(
        shapely.line_interpolate_point(g, np.minimum(frac + 0.01, 1.0), normalized=True)
    )
    behind = shapely.get_coordinates(
        shapely.line_interpolate_point(g, np.maximum(frac - 0.01, 0.0), normalized=True)
    )
    tangent = ahead - behind
    tangent /= np.hypot(tangent[:, 0], tangent[:, 1])[:, None]
    normal = np.stack([-tangent[:, 1], tangent[:, 0]], axis=1)
    offset = rng.uniform(0.0, 12.0, n_on) * rng.choice([-1.0, 1.0], n_on)
    on_xy = here + offset[:, None] * normal

    # About 1% off the network, in parks and on the river banks, more than 40 m
    # from any street: these fall outside a 30 m snapping tolerance.
    n_off = round(0.01 * n_on)
    tree = shapely.STRtree(geom)
    xmin, ymin, xmax, ymax = shapely.total_bounds(geom)
    cand = np.stack(
        [rng.uniform(xmin, xmax, 60 * n_off), rng.uniform(ymin, ymax, 60 * n_off)], axis=1
    )
    cpts = shapely.points(cand)
    parks = shapely.union_all(parcels.geometry.values[parcels["land_use"].to_numpy() == "park"])
    bank = shapely.difference(shapely.buffer(layout.river, 45.0), layout.river)
    hull = shapely.convex_hull(shapely.union_all(geom))
    zone = shapely.intersection(shapely.union_all([parks, bank]), hull)
    shapely.prepare(zone)
    _, dist = tree.query_nearest(cpts, return_distance=True, all_matches=False)
    good = shapely.contains_xy(zone, cand[:, 0], cand[:, 1]) & (dist > 40.0)
    off_xy = cand[good][:n_off]
    n_off = len(off_xy)
    off_year = rng.choice([2024, 2025], n_off)

    xy = np.concatenate([on_xy, off_xy])
    year = np.concatenate([year, off_year])
    inc_use = np.concatenate([use[seg_of], np.full(n_off, LAND_USES.index("park"))])
    pts = shapely.points(xy)

    # Drop the rare point equidistant (to a micrometre) from two segments, so
    # that nearest-segment snapping is unambiguous on every machine.
    near_idx, near_d = tree.query_nearest(
        pts, max_distance=SNAP_DISTANCE_M, return_distance=True, all_matches=True
    )
    pi, si = near_idx
    best = np.full(len(xy), np.inf)
    np.minimum.at(best, pi, near_d)
    close = tree.query(pts, predicate="dwithin", distance=np.where(np.isinf(best), 0, best + 1e-6))
    n_close = np.bincount(close[0], minlength=len(xy))
    unique = np.isinf(best) | (n_close == 1)
    nearest = np.full(len(xy), -1)
    nearest[pi] = si

    keep = np.flatnonzero(unique)
    xy, year, inc_use, nearest = xy[keep], year[keep], inc_use[keep], nearest[keep]
    dates = np.empty(len(xy), dtype="datetime64[D]")
    for y in (2024, 2025):
        sel = year == y
        dates[sel] = _days(rng, y, int(sel.sum()))
    cum = np.cumsum(_TYPE_MIX, axis=1)
    kind = (rng.random(len(xy))[:, None] > cum[inc_use]).sum(axis=1)
    kind = np.minimum(kind, len(INCIDENT_TYPES) - 1)

    order = np.argsort(dates, kind="stable")
    xy, year, nearest, dates, kind = (
        xy[order],
        year[order],
        nearest[order],
        dates[order],
        kind[order],
    )
    incidents = gpd.GeoDataFrame(
        {
            "incident_id": [f"I{k:06d}" for k in range(1, len(xy) + 1)],
            "date": dates.astype("datetime64[ns]"),
            "incident_type": np.array(INCIDENT_TYPES, dtype=object)[kind],
        },
        geometry=shapely.points(xy),
        crs=CRS,
    )
    snapped = nearest >= 0
    y1 = np.bincount(nearest[snapped & (year == 2024)], minlength=len(geom))
    y2 = np.bincount(nearest[snapped & (year == 2025)], minlength=len(geom))
    return incidents, y1.astype(np.int64), y2.astype(np.int64)


# ----------------------------------------------------------------------------
# one shape for generated and loaded data


_COLUMNS = {
    "segments": (
        "segment_id",
        "street",
        "from_street",
        "to_street",
        "description",
        "district",
        "length_m",
        "land_use",
        "incidents_y1",
        "incidents_y2",
    ),
    "parcels": ("parcel_id", "land_use", "district", "address"),
    "districts": ("district",),
    "incidents": ("incident_id", "date", "incident_type"),
    "features": ("kind", "name"),
}
_INTS = ("incidents_y1", "incidents_y2")


def _normalise(region: SampleRegion) -> SampleRegion:
    """Give generated and loaded layers the same columns, dtypes and index."""
    out = {}
    for layer, columns in _COLUMNS.items():
        frame = getattr(region, layer)
        data = {}
        for col in columns:
            values = frame[col]
            if col == "date":
                data[col] = pd.to_datetime(values).dt.normalize().astype("datetime64[ns]")
            elif col == "length_m":
                data[col] = values.astype("float64")
            elif col in _INTS:
                data[col] = values.astype("int64")
            else:
                data[col] = values.astype("str")
        out[layer] = gpd.GeoDataFrame(
            pd.DataFrame(data).reset_index(drop=True),
            geometry=gpd.GeoSeries(frame.geometry.values, crs=CRS).reset_index(drop=True),
            crs=CRS,
        )
    return SampleRegion(**out, name=region.name, path=region.path)
