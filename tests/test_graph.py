"""Tests of geoexp.graph (the exposure graph) and geoexp.sampleregion.synthetic_grid."""

from __future__ import annotations

import types

import geopandas as gpd
import networkx as nx
import numpy as np
import pandas as pd
import pytest
import shapely
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from libpysal.graph import Graph
from scipy.spatial.distance import cdist

from geoexp.errors import CRSError, GeometryError, InputError
from geoexp.graph import ExposureGraph
from geoexp.sampleregion import synthetic_grid

FTUS = 0.30480060960121924


def _pair_dict(graph: ExposureGraph) -> dict[tuple[int, int], float]:
    """Undirected pairs by position -> distance."""
    coo = graph.matrix.tocoo()
    upper = coo.row < coo.col
    return dict(zip(zip(coo.row[upper], coo.col[upper], strict=True), coo.data[upper], strict=True))


def _brute_force(geoms: np.ndarray, max_distance: float) -> dict[tuple[int, int], float]:
    i, j = np.triu_indices(len(geoms), k=1)
    d = shapely.distance(geoms[i], geoms[j])
    keep = d <= max_distance
    return dict(zip(zip(i[keep], j[keep], strict=True), d[keep], strict=True))


def _mixed_layer(seed: int, n: int = 120) -> np.ndarray:
    rng = np.random.default_rng(seed)
    lines = shapely.linestrings(rng.uniform(0, 300, size=(n, 3, 2)))
    corner = rng.uniform(0, 280, (n, 2))
    size = rng.uniform(2, 20, (n, 2)) * np.where(np.arange(n) < 3, 8, 1)[:, None]
    boxes = shapely.box(
        corner[:, 0], corner[:, 1], corner[:, 0] + size[:, 0], corner[:, 1] + size[:, 1]
    )
    polys = shapely.buffer(shapely.points(rng.uniform(0, 300, (n, 2))), rng.uniform(1, 8, n))
    multi = shapely.multilinestrings(
        [shapely.linestrings(rng.uniform(0, 300, (2, 2, 2))[k]) for k in range(2)]
    )
    multipoly = shapely.multipolygons([polys[0], polys[1]])
    # A chain of segments touching end to end (distance exactly 0), and a
    # segment touching another one in its middle.
    chain = shapely.linestrings([[(10, 10), (50, 10)], [(50, 10), (50, 60)], [(50, 60), (90, 60)]])
    tee = shapely.linestrings([[(30, 10), (30, -20)]])
    return np.concatenate([lines[:40], boxes[:20], polys[:40], [multi, multipoly], chain, tee])


# ---------------------------------------------------------------- euclidean


@pytest.mark.parametrize("engine", ["numba", "numpy"])
@pytest.mark.parametrize("seed", [0, 1])
@pytest.mark.parametrize("max_distance", [5.0, 40.0])
def test_euclidean_matches_brute_force_shapely(seed, max_distance, engine):
    geoms = _mixed_layer(seed)
    graph = ExposureGraph.from_geometries(geoms, max_distance, engine=engine)
    got = _pair_dict(graph)
    # Reference: shapely.distance over all pairs (GEOS), no spatial index.
    want = _brute_force(geoms, max_distance)
    assert got.keys() == want.keys()
    np.testing.assert_allclose([got[k] for k in want], list(want.values()), rtol=0, atol=1e-9)
    # Touching segments keep an explicit zero distance (shapely says 0).
    n = len(geoms)
    assert got[(n - 4, n - 3)] == 0.0 and got[(n - 3, n - 2)] == 0.0 and got[(n - 4, n - 1)] == 0.0


def test_euclidean_size_buckets_match_brute_force(monkeypatch):
    # Many tiny units and a few huge ones take the bucketed path; shapely is the reference.
    from geoexp.graph import _euclidean

    monkeypatch.setattr(_euclidean, "CHUNK_CANDIDATES", 500)  # many chunks too
    rng = np.random.default_rng(5)
    small = shapely.buffer(shapely.points(rng.uniform(0, 2000, (400, 2))), 2.0)
    big = shapely.linestrings(rng.uniform(0, 2000, (4, 2, 2)))
    geoms = np.concatenate([small, big])
    bounds = shapely.bounds(geoms)
    assert len(_euclidean._size_buckets(np.hypot(*(bounds[:, 2:] - bounds[:, :2]).T))) > 1
    want = _brute_force(geoms, 60.0)
    for engine in ("numba", "numpy"):  # the box screen's two twins
        got = _pair_dict(ExposureGraph.from_geometries(geoms, 60.0, engine=engine))
        assert got.keys() == want.keys()
        np.testing.assert_allclose([got[k] for k in want], list(want.values()), atol=1e-9)


def test_points_match_libpysal_distance_band():
    rng = np.random.default_rng(3)
    pts = gpd.GeoSeries(shapely.points(rng.uniform(0, 1000, (300, 2))), crs="EPSG:32727")
    graph = ExposureGraph.from_geometries(pts, 80.0)
    # Reference: libpysal.graph.Graph.build_distance_band (binary) on the same points.
    adj = Graph.build_distance_band(pts, 80.0).adjacency.reset_index()
    adj = adj[(adj["focal"] != adj["neighbor"]) & (adj["weight"] > 0)]
    want = set(zip(adj["focal"], adj["neighbor"], strict=True))
    coo = graph.matrix.tocoo()
    got = set(zip(coo.row.tolist(), coo.col.tolist(), strict=True))
    assert got == want
    assert graph.metric == "euclidean" and graph.crs == "EPSG:32727"


def test_feet_crs_gives_metres():
    # A street grid laid out in US survey feet (California zone 3), and the same
    # layer reprojected by pyproj to UTM 10N (metres). The two projections'
    # scale factors differ by about 1e-3 here (from memory), hence the tolerance.
    rng = np.random.default_rng(11)
    base = synthetic_grid(300, spacing=100.0, jitter=5.0, seed=rng).geometry
    shift = shapely.affinity.translate  # move the metre grid to the CA zone 3 area, in feet
    feet = gpd.GeoSeries(
        [shift(shapely.affinity.scale(g, 1 / FTUS, 1 / FTUS, origin=(0, 0)), 0, 0) for g in base]
    )
    b = feet.total_bounds
    feet = feet.translate(6_560_000 - b[0], 2_100_000 - b[1]).set_crs("EPSG:2227")
    metres = feet.to_crs("EPSG:26910")
    g_ft = ExposureGraph.from_geometries(feet, 250.0)
    g_m = ExposureGraph.from_geometries(metres, 250.0)
    assert g_m.crs == "EPSG:26910" and g_ft.crs == "EPSG:2227"
    a, b_ = _pair_dict(g_ft), _pair_dict(g_m)
    common = a.keys() & b_.keys()
    # Pairs may differ only right at the 250 m limit.
    for k in a.keys() ^ b_.keys():
        assert abs(a.get(k, b_.get(k)) - 250.0) < 1.0
    assert len(common) > 0.95 * len(a)
    np.testing.assert_allclose(
        [a[k] for k in common], [b_[k] for k in common], rtol=2e-3, atol=1e-6
    )
    # Explicit metres_per_unit that disagrees with the CRS is refused.
    with pytest.raises(CRSError):
        ExposureGraph.from_geometries(feet, 250.0, metres_per_unit=1.0)
    # The same numbers from a bare array and the factor given by hand (analytic: x FTUS).
    g_arr = ExposureGraph.from_geometries(np.asarray(feet.values), 250.0, metres_per_unit=FTUS)
    np.testing.assert_array_equal(g_arr.distances, g_ft.distances)


def test_geographic_crs_refused():
    pts = gpd.GeoSeries(shapely.points([(0, 0), (0.001, 0)]), crs="EPSG:4326")
    with pytest.raises(CRSError):
        ExposureGraph.from_geometries(pts, 100.0)


# ------------------------------------------------------------------ network


def _street_layer(seed: int, n: int = 260, nudge: float = 0.0):
    """A jittered grid with some segments removed; end points optionally nudged."""
    rng = np.random.default_rng(seed)
    grid = synthetic_grid(n, spacing=100.0, jitter=8.0, seed=seed).geometry.values
    grid = np.asarray(grid)[rng.random(n) > 0.15]
    coords = shapely.get_coordinates(grid).reshape(-1, 2, 2)
    exact = coords.copy()
    if nudge:
        coords = coords + rng.uniform(-nudge, nudge, coords.shape)
    return shapely.linestrings(coords), exact


def _networkx_distances(exact: np.ndarray, lengths: np.ndarray, limit: float):
    # Reference: networkx on a network built here independently: nodes are the
    # exact shared end points, edges the segments weighted by their length.
    g = nx.Graph()
    ends = [(tuple(s), tuple(e)) for s, e in exact]
    for (u, v), w in zip(ends, lengths, strict=True):
        if u != v and (not g.has_edge(u, v) or g[u][v]["weight"] > w):
            g.add_edge(u, v, weight=float(w))
    g.add_nodes_from(p for uv in ends for p in uv)
    out = {}
    for a, (u, v) in enumerate(ends):
        reach = nx.multi_source_dijkstra_path_length(g, {u, v}, cutoff=limit, weight="weight")
        for b, (x, y) in enumerate(ends):
            if b > a:
                d = min(reach.get(x, np.inf), reach.get(y, np.inf))
                if d <= limit:
                    out[(a, b)] = d
    return out


@pytest.mark.parametrize("engine", ["numba", "numpy"])
def test_network_matches_networkx(engine):
    geoms, exact = _street_layer(2, nudge=0.3)
    graph = ExposureGraph.from_geometries(
        geoms, 350.0, metric="network", snap_tolerance=1.0, engine=engine
    )
    got = _pair_dict(graph)
    want = _networkx_distances(exact, shapely.length(geoms), 350.0)
    assert got.keys() == want.keys()
    # Lengths of the nudged segments feed both sides, so only rounding differs.
    np.testing.assert_allclose([got[k] for k in want], list(want.values()), atol=1e-9)
    # Segments sharing an intersection are at distance 0 (they meet there).
    assert min(got.values()) == 0.0


def test_network_without_snapping_splits_nudged_ends():
    # With no tolerance, nudged end points no longer meet: fewer pairs than with snapping.
    geoms, _ = _street_layer(4, nudge=0.3)
    snapped = ExposureGraph.from_geometries(geoms, 300.0, metric="network", snap_tolerance=1.0)
    apart = ExposureGraph.from_geometries(geoms, 300.0, metric="network", snap_tolerance=0.0)
    assert apart.n_pairs == 0 and snapped.n_pairs > 0


@pytest.mark.parametrize("seed", [0, 7])
def test_network_engines_identical(seed):
    grid = synthetic_grid(3000, jitter=4.0 * seed, seed=seed)
    built = {
        engine: ExposureGraph.from_geometries(grid.geometry, 500.0, metric="network", engine=engine)
        for engine in ("numba", "numpy")
    }
    a, b = built["numba"], built["numpy"]
    assert a.n_pairs > 0
    np.testing.assert_array_equal(a.indptr, b.indptr)
    np.testing.assert_array_equal(a.indices, b.indices)
    np.testing.assert_array_equal(a.distances, b.distances)


def test_network_needs_segments():
    parcels = synthetic_grid(20, kind="parcel")
    with pytest.raises(InputError, match="street segments"):
        ExposureGraph.from_geometries(parcels.geometry, 100.0, metric="network")
    stand_in = types.SimpleNamespace(
        geometry=parcels.set_index("unit_id").geometry,
        ids=pd.Index(parcels["unit_id"]),
        metres_per_unit=1.0,
        kind="parcel",
        crs=parcels.crs,
    )
    with pytest.raises(InputError, match="street segments"):
        ExposureGraph.from_units(stand_in, 100.0, metric="network")


def test_from_units_uses_unit_ids():
    from geoexp.units import UnitSet

    grid = synthetic_grid(50)
    grid["unit_id"] = [f"seg-{k}" for k in range(50)]
    units = UnitSet.from_frame(grid, "unit_id", kind="segment")
    graph = ExposureGraph.from_units(units, 150.0)
    assert graph.ids.equals(units.ids)
    ref = ExposureGraph.from_geometries(grid.geometry, 150.0)
    np.testing.assert_array_equal(graph.distances, ref.distances)  # same layer, same order


# -------------------------------------------------------------------- bands


def _points(seed, n=200):
    rng = np.random.default_rng(seed)
    return rng.uniform(0, 800, (n, 2))


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_nearest_distance_and_bands_match_numpy(seed):
    xy = _points(seed)
    graph = ExposureGraph.from_geometries(shapely.points(xy), 150.0)
    rng = np.random.default_rng(seed + 100)
    sources = np.flatnonzero(rng.random(len(xy)) < 0.1)
    # Reference: dense numpy/scipy cdist; nearest source other than the unit itself.
    full = cdist(xy, xy[sources])
    full[sources, np.arange(len(sources))] = np.inf
    full[full > 150.0] = np.inf
    want = full.min(axis=1)
    np.testing.assert_allclose(graph.nearest_distance(sources), want, atol=1e-9)
    mask = np.zeros(len(xy), dtype=bool)
    mask[sources] = True
    np.testing.assert_array_equal(graph.nearest_distance(mask), graph.nearest_distance(sources))
    not_src = ~mask
    for low, high in [(0.0, 50.0), (50.0, 100.0), (100.0, 150.0)]:
        inside = (want <= high) & ((want > low) if low > 0 else (want >= 0)) & not_src
        np.testing.assert_array_equal(
            graph.band_members(sources, low, high), np.flatnonzero(inside)
        )


def test_first_band_includes_touching_units():
    # Analytic: three touching segments; the middle one is the source.
    lines = shapely.linestrings([[(0, 0), (10, 0)], [(10, 0), (20, 0)], [(20, 0), (30, 0)]])
    graph = ExposureGraph.from_geometries(lines, 50.0, ids=["a", "b", "c"])
    src = graph.positions(["b"])
    np.testing.assert_array_equal(graph.nearest_distance(src), [0.0, np.inf, 0.0])
    np.testing.assert_array_equal(graph.band_members(src, 0.0, 5.0), [0, 2])
    assert graph.band_members(src, 5.0, 50.0).size == 0
    with pytest.raises(InputError):
        graph.band_members(src, 0.0, 60.0)  # beyond max_distance
    with pytest.raises(InputError, match="unknown"):
        graph.positions(["zz"])


# --------------------------------------------------------- io and structure


@pytest.mark.parametrize(
    "ids",
    [
        [10, 20, 30, 40, 50, 60],
        ["a", "b", "c", "d", "e", "f"],
        ["Straße 1", "Ünter 2", "街道3", "ulica-ł", "rue é", "ø"],
    ],
)
def test_save_load_round_trip(tmp_path, ids):
    xy = np.array([[0, 0], [3, 0], [6, 0], [100, 0], [102, 0], [500, 500]], dtype=float)
    graph = ExposureGraph.from_geometries(shapely.points(xy), 10.0, ids=pd.Index(ids, name="uid"))
    path = tmp_path / "graph.npz"
    graph.save(path)
    back = ExposureGraph.load(path)
    assert list(back.ids) == list(ids) and back.ids.name == "uid"
    for name in ("indptr", "indices", "distances"):
        np.testing.assert_array_equal(getattr(back, name), getattr(graph, name))
        assert getattr(back, name).dtype == getattr(graph, name).dtype
    assert (back.max_distance, back.metric, back.crs) == (10.0, "euclidean", None)
    pd.testing.assert_frame_equal(back.pairs(), graph.pairs(), check_index_type=False)
    # Analytic: points 0,1,2 are 3 m apart in a row; 3 and 4 are 2 m apart.
    assert graph.n_pairs == 4
    assert sorted(graph.pairs()["distance_m"]) == [2.0, 3.0, 3.0, 6.0]


def test_empty_graph(tmp_path):
    pts = shapely.points([(0, 0), (1000, 0), (0, 1000)])
    graph = ExposureGraph.from_geometries(pts, 10.0)
    assert graph.n_pairs == 0 and graph.matrix.nnz == 0
    assert graph.pairs().empty
    assert np.isinf(graph.nearest_distance([0])).all()
    assert graph.band_members([0], 0.0, 10.0).size == 0
    graph.save(tmp_path / "empty.npz")
    assert ExposureGraph.load(tmp_path / "empty.npz").n == 3
    single = ExposureGraph.from_geometries(shapely.points([(0, 0)]), 10.0, metric="euclidean")
    assert single.n == 1 and single.n_pairs == 0
    assert ExposureGraph.from_geometries(np.array([], dtype=object), 10.0).n == 0


@pytest.mark.parametrize("bad", [0, -5.0, float("nan"), float("inf")])
def test_max_distance_must_be_positive(bad):
    with pytest.raises(InputError):
        ExposureGraph.from_geometries(shapely.points([(0, 0), (1, 1)]), bad)


def test_missing_geometry_names_rows():
    geoms = np.array([shapely.Point(0, 0), None, shapely.LineString()], dtype=object)
    with pytest.raises(GeometryError, match="'u2', 'u3'"):
        ExposureGraph.from_geometries(geoms, 10.0, ids=["u1", "u2", "u3"])


def test_within_equals_smaller_build():
    grid = synthetic_grid(500, jitter=6.0, seed=3)
    big = ExposureGraph.from_geometries(grid.geometry, 300.0)
    small = ExposureGraph.from_geometries(grid.geometry, 120.0)
    cut = big.within(120.0)
    np.testing.assert_array_equal(cut.indptr, small.indptr)
    np.testing.assert_array_equal(cut.indices, small.indices)
    np.testing.assert_array_equal(cut.distances, small.distances)
    with pytest.raises(InputError):
        big.within(400.0)


def test_from_pairs_symmetrises_and_validates():
    graph = ExposureGraph.from_pairs(["x", "y", "z"], [0, 2], [1, 1], [5.0, 0.0], max_distance=10)
    dense = graph.matrix.toarray()
    np.testing.assert_array_equal(dense, dense.T)
    assert graph.matrix.nnz == 4  # the zero distance is stored explicitly
    with pytest.raises(InputError, match="more than once"):
        ExposureGraph.from_pairs(["x", "y"], [0, 1], [1, 0], [1.0, 1.0], max_distance=10)
    with pytest.raises(InputError):
        ExposureGraph.from_pairs(["x", "y"], [0], [1], [11.0], max_distance=10)
    with pytest.raises(InputError):
        ExposureGraph.from_pairs(["x", "y"], [0], [0], [1.0], max_distance=10)


def test_graph_arrays_are_read_only():
    graph = ExposureGraph.from_geometries(shapely.points([(0, 0), (1, 0)]), 10.0)
    with pytest.raises(ValueError):
        graph.distances[0] = 5.0


coords = st.floats(min_value=0, max_value=500, allow_nan=False)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    xy=st.lists(st.tuples(coords, coords, coords, coords), min_size=2, max_size=40),
    max_distance=st.floats(min_value=0.5, max_value=300),
)
def test_property_symmetric_and_within_limit(xy, max_distance):
    arr = np.array(xy)
    lines = shapely.linestrings(arr.reshape(-1, 2, 2))
    lines = np.where(shapely.length(lines) > 0, lines, shapely.points(arr[:, :2]))
    graph = ExposureGraph.from_geometries(lines, max_distance)
    m = graph.matrix
    # Analytic invariants: symmetric, no self loops, every distance within the limit.
    assert (m != m.T).nnz == 0
    np.testing.assert_array_equal(m.diagonal(), 0)
    assert not np.any(graph.indices == np.repeat(np.arange(graph.n), graph.degree))
    assert np.all(graph.distances <= max_distance) and np.all(graph.distances >= 0)
    # and nothing missed: shapely brute force is the reference.
    assert graph.n_pairs == len(_brute_force(lines, max_distance))


# ------------------------------------------------------------ synthetic grid


def test_synthetic_grid_segments():
    grid = synthetic_grid(1001)
    assert len(grid) == 1001 and grid["unit_id"].dtype == np.int64
    assert grid.crs.to_epsg() == 32727
    assert grid["unit_id"].is_unique
    lengths = shapely.length(grid.geometry.values)
    np.testing.assert_allclose(lengths, 100.0)  # analytic: every block is `spacing` long
    ends = shapely.get_coordinates(grid.geometry.values).reshape(-1, 2, 2)
    _, count = np.unique(ends.reshape(-1, 2), axis=0, return_counts=True)
    # Analytic: on a square lattice an intersection joins at most 4 segments,
    # and segments meet exactly (shared coordinates), so most nodes have 3-4.
    assert count.max() == 4 and np.mean(count >= 3) > 0.8
    jittered = synthetic_grid(1001, jitter=5.0, seed=1)
    ends_j = shapely.get_coordinates(jittered.geometry.values).reshape(-1, 2)
    assert len(np.unique(ends_j, axis=0)) == len(np.unique(ends.reshape(-1, 2), axis=0))


def test_synthetic_grid_parcels():
    grid = synthetic_grid(401, kind="parcel")
    assert len(grid) == 401
    geoms = grid.geometry.values
    np.testing.assert_allclose(shapely.area(geoms), 900.0)  # analytic: 30 m squares
    graph = ExposureGraph.from_geometries(grid.geometry, 15.0)
    # Analytic: parcels are 10 m apart side by side and 10*sqrt(2) m corner to corner.
    assert set(np.round(graph.distances, 9)) == {10.0, round(10 * np.sqrt(2), 9)}
    with pytest.raises(InputError):
        synthetic_grid(-1)


def test_within_open_drops_pairs_exactly_at_the_distance():
    graph = ExposureGraph.from_pairs(np.arange(3), [0, 1], [1, 2], [50.0, 80.0], max_distance=100.0)
    assert graph.within(50.0).indices.size == 2  # the pair 0-1, both directions
    assert graph.within(50.0, closed=False).indices.size == 0
    assert graph.within(80.0, closed=False).indices.size == 2
