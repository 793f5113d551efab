"""Tests of street layers whose lines cross or touch away from their end points."""

from __future__ import annotations

import warnings

import geopandas as gpd
import networkx as nx
import numpy as np
import pytest
import shapely
from shapely.ops import split

from geoexp.graph import ExposureGraph, NetworkWarning, network_diagnostics
from geoexp.sampleregion import synthetic_grid

H, V = 4, 5  # long horizontal and vertical streets, 100 m apart
BAND = 150.0


def _layer():
    """Long streets crossing without shared end points, T-junctions, and one bridge.

    * H horizontal lines y = 0, 100, ... from x = -50 to the far side + 50 and
      V vertical lines x = 0, 100, ... likewise: H * V crossings, none at an
      end point;
    * V - 1 dead ends below y = 0 at x = 50, 150, ..., each two segments
      (0 to -20 and -20 to -40): V - 1 touches (a T on the street y = 0) and
      V - 1 shared end points;
    * a bridge from (0, 150) to (300, 150): its ends touch the streets x = 0
      and x = 300 (2 touches), and it passes over x = 100 and x = 200
      (2 crossings that must stay apart).
    """
    right, top = (V - 1) * 100 + 50, (H - 1) * 100 + 50
    streets = [shapely.LineString([(-50, k * 100), (right, k * 100)]) for k in range(H)]
    streets += [shapely.LineString([(m * 100, -50), (m * 100, top)]) for m in range(V)]
    for m in range(V - 1):
        x = m * 100 + 50
        streets += [
            shapely.LineString([(x, 0), (x, -20)]),
            shapely.LineString([(x, -20), (x, -40)]),
        ]
    bridge = shapely.LineString([(0, 150), (300, 150)])
    geoms = np.array([*streets, bridge], dtype=object)
    marks = np.zeros(len(geoms), dtype=bool)
    marks[-1] = True
    return geoms, marks


def _reference(geoms, marks, limit):
    """networkx distances on the split layer, built here without geoexp.

    Unmarked lines are split at every point where they meet with GEOS noding
    (``shapely.node``), then at the end points of marked lines that land on
    them (``shapely.ops.split``); marked lines stay whole edges. A unit's
    distance to another is the shortest walk between any node on one and any
    node on the other (Dijkstra 1959, networkx ``multi_source_dijkstra``).
    """
    plain = shapely.node(shapely.multilinestrings(list(geoms[~marks])))
    pieces = list(shapely.get_parts(plain))
    for end in [p for line in geoms[marks] for p in shapely.get_parts(shapely.boundary(line))]:
        out = []
        for piece in pieces:
            hit = piece.distance(end) < 1e-9 and not piece.boundary.distance(end) < 1e-9
            out.extend(split(piece, end).geoms if hit else [piece])
        pieces = out
    pieces += list(geoms[marks])

    def key(xy):
        return (round(xy[0], 6), round(xy[1], 6))

    g = nx.Graph()
    for piece in pieces:
        c = shapely.get_coordinates(piece)
        u, v = key(c[0]), key(c[-1])
        if u != v and (not g.has_edge(u, v) or g[u][v]["weight"] > piece.length):
            g.add_edge(u, v, weight=piece.length)
    node_pts = shapely.points(np.array(list(g.nodes)))
    on = [
        [n for n, p in zip(g.nodes, node_pts, strict=True) if line.distance(p) < 1e-6]
        for line in geoms
    ]
    # A marked line owns only its end points: it is not joined where it passes over.
    for k in np.flatnonzero(marks):
        ends = {key(c) for c in shapely.get_coordinates(shapely.boundary(geoms[k]))}
        on[k] = [n for n in on[k] if n in ends]
    out = {}
    for a in range(len(geoms)):
        reach = nx.multi_source_dijkstra_path_length(g, set(on[a]), cutoff=limit)
        for b in range(a + 1, len(geoms)):
            d = min((reach.get(n, np.inf) for n in on[b]), default=np.inf)
            if d <= limit:
                out[(a, b)] = d
    return out


def _pairs(graph):
    frame = graph.pairs()
    return dict(
        zip(zip(frame["unit_a"], frame["unit_b"], strict=True), frame["distance_m"], strict=True)
    )


def test_detection_counts_are_exact():
    geoms, marks = _layer()
    graph = ExposureGraph.from_geometries(
        geoms, BAND, metric="network", split_at_crossings=True, grade_separated=marks
    )
    info = graph.network
    # Counted from the generator (see _layer's docstring).
    assert info.crossings == H * V + 2
    assert info.touches == (V - 1) + 2
    assert info.shared_ends == V - 1
    assert info.kept_apart == 2  # the bridge over x = 100 and x = 200
    assert info.grade_separated_units == 1
    assert info.split_at_crossings
    # Each joined crossing adds a node on both lines, each joined touch one.
    assert info.nodes_added == 2 * H * V + (V - 1) + 2
    # The counts do not depend on whether the network is split.
    with pytest.warns(NetworkWarning, match=f"{H * V + 2} crossings and {V + 1} touches"):
        plain = ExposureGraph.from_geometries(geoms, BAND, metric="network", grade_separated=marks)
    assert not plain.network.split_at_crossings and plain.network.nodes_added == 0
    assert plain.network.crossings == info.crossings and plain.network.touches == info.touches


@pytest.mark.parametrize("engine", ["numba", "numpy"])
def test_split_distances_match_networkx(engine):
    geoms, marks = _layer()
    graph = ExposureGraph.from_geometries(
        geoms,
        350.0,
        metric="network",
        split_at_crossings=True,
        grade_separated=marks,
        engine=engine,
    )
    got = _pairs(graph)
    want = _reference(geoms, marks, 350.0)  # networkx on the split layer
    assert got.keys() == want.keys()
    np.testing.assert_allclose([got[k] for k in want], list(want.values()), atol=1e-9)


def test_bridge_stays_apart():
    geoms, marks = _layer()
    bridge = len(geoms) - 1
    x100 = H + 1  # the vertical street x = 100
    graph = ExposureGraph.from_geometries(
        geoms, BAND, metric="network", split_at_crossings=True, grade_separated=marks
    )
    d = _pairs(graph)[(x100, bridge)]
    # networkx on the split layer: the walk from the bridge's ends.
    assert d == pytest.approx(_reference(geoms, marks, BAND)[(x100, bridge)], abs=1e-9)
    # Analytic: from (0, 150) 50 m along x = 0 to y = 100, then 100 m to x = 100.
    assert d == pytest.approx(150.0)
    # Left unmarked, the bridge would meet the street it passes over.
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        joined = ExposureGraph.from_geometries(
            geoms, BAND, metric="network", split_at_crossings=True
        )
    assert _pairs(joined)[(x100, bridge)] == 0.0
    assert joined.network.kept_apart == 0


def test_levels_mark_like_booleans():
    geoms, marks = _layer()
    levels = np.where(marks, 1, 0)
    a = ExposureGraph.from_geometries(
        geoms, BAND, metric="network", split_at_crossings=True, grade_separated=marks
    )
    b = ExposureGraph.from_geometries(
        geoms, BAND, metric="network", split_at_crossings=True, grade_separated=levels
    )
    np.testing.assert_array_equal(a.distances, b.distances)
    np.testing.assert_array_equal(a.indices, b.indices)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_random_crossing_lines_match_networkx(seed):
    # Random long lines cross anywhere; with no snapping, the reference nodes
    # are exactly GEOS's noding of the whole layer (shapely.node).
    rng = np.random.default_rng(seed)
    geoms = shapely.linestrings(rng.uniform(0, 1000, size=(40, 3, 2)))
    marks = np.zeros(len(geoms), dtype=bool)
    built = {
        engine: ExposureGraph.from_geometries(
            geoms,
            400.0,
            metric="network",
            snap_tolerance=0.0,
            split_at_crossings=True,
            engine=engine,
        )
        for engine in ("numba", "numpy")
    }
    got = _pairs(built["numba"])
    want = _reference(geoms, marks, 400.0)
    assert got.keys() == want.keys() and len(want) > 50
    np.testing.assert_allclose([got[k] for k in want], list(want.values()), atol=1e-6)
    # Both engines give identical pairs and distances.
    a, b = built["numba"], built["numpy"]
    np.testing.assert_array_equal(a.indptr, b.indptr)
    np.testing.assert_array_equal(a.indices, b.indices)
    np.testing.assert_array_equal(a.distances, b.distances)


def test_engines_identical_on_the_split_layer():
    geoms, marks = _layer()
    built = [
        ExposureGraph.from_geometries(
            geoms,
            BAND,
            metric="network",
            split_at_crossings=True,
            grade_separated=marks,
            engine=engine,
        )
        for engine in ("numba", "numpy")
    ]
    np.testing.assert_array_equal(built[0].indptr, built[1].indptr)
    np.testing.assert_array_equal(built[0].indices, built[1].indices)
    np.testing.assert_array_equal(built[0].distances, built[1].distances)


def test_sparse_network_warning():
    geoms, marks = _layer()
    loose = network_diagnostics(geoms, BAND, grade_separated=marks)
    noded = network_diagnostics(geoms, BAND, grade_separated=marks, split_at_crossings=True)
    # Along streets never shorter than a straight line: the along-street pairs
    # are a subset of the straight-line pairs.
    assert loose.straight_pairs == noded.straight_pairs >= noded.network_pairs
    assert loose.ratio < 0.25 <= noded.ratio
    assert any("along streets" in w and "split" in w for w in loose.warnings)
    assert noded.warnings == ()
    # Un-noded, every long street is its own piece; noded, one network.
    assert noded.n_components == 1 and noded.largest_component_units == len(geoms)
    assert loose.n_components > 1
    assert len(noded.isolated) == 0 and len(loose.stranded) > 0
    assert "Warning:" in str(loose)


def test_diagnostics_reuse_a_graph():
    geoms, marks = _layer()
    graph = ExposureGraph.from_geometries(
        geoms, 300.0, metric="network", split_at_crossings=True, grade_separated=marks
    )
    fresh = network_diagnostics(geoms, BAND, grade_separated=marks, split_at_crossings=True)
    reused = network_diagnostics(
        geoms, BAND, grade_separated=marks, split_at_crossings=True, graph=graph
    )
    assert fresh.to_dict() == reused.to_dict()
    assert fresh.network_pairs == graph.within(BAND).n_pairs


def test_network_record_survives_save_and_within(tmp_path):
    geoms, marks = _layer()
    graph = ExposureGraph.from_geometries(
        geoms, BAND, metric="network", split_at_crossings=True, grade_separated=marks
    )
    graph.save(tmp_path / "g.npz")
    again = ExposureGraph.load(tmp_path / "g.npz")
    assert again.network == graph.network
    assert graph.within(100.0).network == graph.network
    assert "split where they cross" in graph.network.describe()


def test_noded_grid_meets_only_at_shared_ends():
    # A layer split at every junction: each pair of segments that intersects
    # (shapely/GEOS ``intersection``, over all pairs here) meets at one shared
    # end point, so every meeting is a shared end and nothing is added.
    grid = synthetic_grid(300, jitter=5.0, seed=4)
    geoms = np.asarray(grid.geometry.values, dtype=object)
    i, j = np.triu_indices(len(geoms), k=1)
    meet = shapely.intersection(geoms[i], geoms[j])
    n_points = int(shapely.get_num_geometries(meet[~shapely.is_empty(meet)]).sum())
    graph = ExposureGraph.from_geometries(geoms, 200.0, metric="network", split_at_crossings=True)
    info = graph.network
    assert info.shared_ends == n_points > 0
    assert info.crossings == info.touches == info.nodes_added == 0


def test_overlapping_segments_with_a_shared_end():
    # Two straight segments from (0, 0) along the same ray overlap from 0 to 5:
    # the overlap's far end (5, 0) is an end of the short one inside the long one.
    geoms = shapely.linestrings([[(0, 0), (10, 0)], [(0, 0), (5, 0)], [(0, 0), (0, 7)]])
    with pytest.warns(NetworkWarning, match="1 touches"):
        graph = ExposureGraph.from_geometries(geoms, 50.0, metric="network", snap_tolerance=0.0)
    info = graph.network
    assert info.overlaps == 1
    assert info.touches == 1  # (5, 0): end of the short segment, middle of the long one
    assert info.shared_ends == 3  # (0, 0) for each of the three pairs


def test_bridge_column_of_a_unit_set():
    from geoexp.errors import InputError
    from geoexp.units import UnitSet

    geoms, marks = _layer()
    frame = gpd.GeoDataFrame(
        {"seg": np.arange(len(geoms)) * 10, "level": np.where(marks, 1, 0)},
        geometry=list(geoms),
        crs="EPSG:32633",
    )
    units = UnitSet.from_frame(frame, "seg")
    graph = ExposureGraph.from_units(
        units, BAND, metric="network", split_at_crossings=True, bridge_column="level"
    )
    plain = ExposureGraph.from_geometries(
        geoms, BAND, metric="network", split_at_crossings=True, grade_separated=marks
    )
    np.testing.assert_array_equal(graph.distances, plain.distances)
    assert graph.network == plain.network
    found = network_diagnostics(units, BAND, split_at_crossings=True, bridge_column="level")
    assert found.network.kept_apart == 2 and found.warnings == ()
    with pytest.raises(InputError, match="'levle'"):
        ExposureGraph.from_units(units, BAND, metric="network", bridge_column="levle")
    holes = frame.assign(level=np.where(marks, 1.0, np.nan))
    with pytest.raises(InputError, match="empty for ids 0, 10"):
        ExposureGraph.from_units(
            UnitSet.from_frame(holes, "seg"), BAND, metric="network", bridge_column="level"
        )
