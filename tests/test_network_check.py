"""Street layers as agencies keep them, through a design spec: crossings, bridges, planar, row ids."""

from __future__ import annotations

import warnings

import geopandas as gpd
import networkx as nx
import numpy as np
import pandas as pd
import pytest
import shapely

from geoexp.design import Design, DesignSpec, network_check, refuse_sparse_network, used_columns
from geoexp.errors import DesignError, InputError
from geoexp.graph import NetworkWarning
from geoexp.trialfile import TrialFile, design_from_trial, write_trial

N = 6  # streets each way, 100 m apart
PIECE = 200.0  # each street is cut into pieces of this length, ends off the crossings
BRIDGE = 2  # the vertical street x = 200 is a flyover over every horizontal street


def street_layer(*, bridge: bool = False, with_id: bool = False) -> gpd.GeoDataFrame:
    """Streets that cross without sharing an end point, in local coordinates with no CRS.

    N horizontal streets y = 0, 100, ... and N vertical streets x = 0, 100, ...,
    each from -50 to (N - 1) * 100 + 50 and cut into pieces of 200 m whose ends
    (at -50, 150, 350, ...) never lie on another street: N * N crossings, all
    away from end points, and the pieces of one street meet at shared ends.
    """
    lines, level, kind = [], [], []
    far = (N - 1) * 100 + 50
    cuts = np.arange(-50.0, far, PIECE)
    for j in range(N):
        for a in cuts:
            lines.append(shapely.LineString([(a, 100 * j), (min(a + PIECE, far), 100 * j)]))
            level.append(0)
            kind.append("h")
    for i in range(N):
        for a in cuts:
            lines.append(shapely.LineString([(100 * i, a), (100 * i, min(a + PIECE, far))]))
            level.append(1 if bridge and i == BRIDGE else 0)
            kind.append("v")
    frame = gpd.GeoDataFrame(
        {
            "level": level,
            "kind": kind,
            "incidents_y1": np.arange(len(lines)) % 7,
        },
        geometry=lines,
        crs=None,
    )
    if with_id:
        frame.insert(0, "segment_id", [f"s{k:03d}" for k in range(len(lines))])
    return frame


def write_layer(frame: gpd.GeoDataFrame, path) -> None:
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="'crs' was not provided")
        frame.to_file(path, layer="streets", engine="pyogrio")


def spec_for(path, **exposure) -> DesignSpec:
    return DesignSpec.from_dict(
        {
            "name": "Street layer as it comes",
            "seed": 11,
            "draws": 200,
            "units": {"path": str(path), "planar": "m", "number_rows": True},
            "eligible": {"top_column": "incidents_y1", "top_k": 20},
            "assignment": {"method": "complete", "treated": 4},
            "exposure": {"bands_m": [100, 200], "metric": "network", **exposure},
        }
    )


def networkx_distances(geoms: np.ndarray, marks: np.ndarray, limit: float) -> dict:
    """Along-street distances on the split layer, built here with shapely and networkx.

    Unmarked lines are split at every point where they meet (GEOS noding,
    ``shapely.node``); marked lines stay whole and own only their end points.
    A unit's distance to another is the shortest walk between a node on one
    and a node on the other (Dijkstra 1959, networkx
    ``multi_source_dijkstra_path_length``).
    """
    pieces = list(shapely.get_parts(shapely.node(shapely.multilinestrings(list(geoms[~marks])))))
    pieces += list(geoms[marks])

    def key(xy):
        return (round(float(xy[0]), 6), round(float(xy[1]), 6))

    g = nx.Graph()
    for piece in pieces:
        c = shapely.get_coordinates(piece)
        g.add_edge(key(c[0]), key(c[-1]), weight=piece.length)
    nodes = list(g.nodes)
    points = shapely.points(np.array(nodes))
    owned = []
    for k, line in enumerate(geoms):
        if marks[k]:
            owned.append({key(c) for c in shapely.get_coordinates(line)[[0, -1]]})
        else:
            owned.append({n for n, p in zip(nodes, points, strict=True) if line.distance(p) < 1e-6})
    out = {}
    for a in range(len(geoms)):
        reach = nx.multi_source_dijkstra_path_length(g, owned[a], cutoff=limit)
        for b in range(a + 1, len(geoms)):
            d = min((reach.get(n, np.inf) for n in owned[b]), default=np.inf)
            if d <= limit:
                out[(a, b)] = d
    return out


def graph_distances(graph) -> dict:
    frame = graph.pairs()
    return dict(
        zip(zip(frame["unit_a"], frame["unit_b"], strict=True), frame["distance_m"], strict=True)
    )


def test_crossings_counted_exactly_and_the_draw_refused(tmp_path):
    path = tmp_path / "streets.gpkg"
    write_layer(street_layer(), path)
    with pytest.warns(NetworkWarning):
        design = Design.from_spec(spec_for(path))
    found = network_check(design)
    # N horizontal by N vertical streets, every crossing away from an end point (by construction)
    assert found.network.crossings == N * N
    assert found.network.touches == 0
    assert not found.network.split_at_crossings
    # pieces of one street meet end to end: (pieces per street - 1) per street
    per_street = len(np.arange(-50.0, (N - 1) * 100 + 50, PIECE))
    assert found.network.shared_ends == 2 * N * (per_street - 1)
    # unsplit, each street is its own component
    assert found.n_components == 2 * N
    assert found.sparse
    with pytest.raises(DesignError, match="accept_sparse_network"):
        refuse_sparse_network(design, found)
    check = design.check(n_draws=200)
    assert str(found) in str(check)
    assert any("drawing is refused" in line for line in check.verdict)
    with pytest.warns(NetworkWarning):
        accepted = Design.from_spec(spec_for(path, accept_sparse_network=True))
    refuse_sparse_network(accepted, network_check(accepted))  # the spec accepts it: no error


def test_split_layer_matches_networkx_and_the_bridge_stays_apart(tmp_path):
    frame = street_layer(bridge=True)
    path = tmp_path / "streets.gpkg"
    write_layer(frame, path)
    design = Design.from_spec(spec_for(path, split_at_crossings=True, bridge_column="level"))
    geoms = np.asarray(frame.geometry.values, dtype=object)
    marks = frame["level"].to_numpy() != 0
    expected = networkx_distances(geoms, marks, design.graph.max_distance)
    got = graph_distances(design.graph)
    assert set(got) == set(expected)
    for pair, d in expected.items():
        assert got[pair] == pytest.approx(d, abs=1e-6)  # networkx shortest paths
    info = network_check(design).network
    assert info.split_at_crossings
    assert info.kept_apart == N  # the flyover passes over every horizontal street
    # a piece of the flyover reaches a crossing street only through the flyover's ends
    bridge_piece = int(np.flatnonzero(marks)[1])  # the middle piece: its ends lie on no street
    neighbours = design.graph.indices[
        design.graph.indptr[bridge_piece] : design.graph.indptr[bridge_piece + 1]
    ]
    assert set(neighbours.tolist()) <= set(np.flatnonzero(marks).tolist())
    assert not network_check(design).sparse
    # the grade-separation column is part of what the design uses
    assert "level" in used_columns(design.spec, list(frame.columns))


def test_network_keys_change_the_design_and_are_recorded(tmp_path):
    path = tmp_path / "streets.gpkg"
    write_layer(street_layer(), path)
    plain = spec_for(path, accept_sparse_network=True)
    split = spec_for(path, split_at_crossings=True)
    assert plain.hash != split.hash
    assert spec_for(path, split_at_crossings=False).hash == spec_for(path).hash
    design = Design.from_spec(split)
    assert (
        design.fingerprint.parts["spec"]
        != Design.from_spec(
            spec_for(path, split_at_crossings=True, snap_tolerance_m=2.0)
        ).fingerprint.parts["spec"]
    )
    trial = tmp_path / "trial.gpkg"
    write_trial(trial, design, design.draw(), design.probabilities(200))
    tf = TrialFile.open(trial)
    assert tf.network == design.graph.network.to_dict()
    assert tf.network["split_at_crossings"] is True
    assert tf.network["crossings"] == N * N
    assert tf.coordinates == "local planar coordinates in metres (no CRS)"
    # the units come back numbered as drawn, and the stored design is the same one
    rebuilt, assignment = design_from_trial(tf)
    assert rebuilt.units.ids.equals(design.units.ids)
    assert list(tf.units().index[:3]) == [0, 1, 2]
    assert rebuilt.fingerprint.digest == design.fingerprint.digest
    assert np.array_equal(assignment.treated, design.draw().treated)


@pytest.mark.parametrize("metric", ["euclidean", "network"])
def test_planar_spec_equals_a_metric_crs(tmp_path, metric):
    frame = street_layer()
    shifted = frame.set_geometry(frame.geometry.translate(500_000, 5_000_000))
    write_layer(shifted, tmp_path / "planar.gpkg")
    shifted.set_crs("EPSG:32633").to_file(tmp_path / "utm.gpkg", layer="streets")
    extra = {"split_at_crossings": True} if metric == "network" else {}
    base = spec_for(tmp_path / "planar.gpkg", metric=metric, **extra)
    planar = Design.from_spec(base)
    data = base.to_dict()
    data["units"] = {"path": str(tmp_path / "utm.gpkg"), "crs": "EPSG:32633", "number_rows": True}
    utm = Design.from_spec(DesignSpec.from_dict(data))
    # pyproj: EPSG:32633 (UTM 33N) is in metres, so the same coordinates give the same graph
    pd.testing.assert_frame_equal(planar.graph.pairs(), utm.graph.pairs())
    assert planar.units.is_planar and not utm.units.is_planar
    text = str(planar.check(n_draws=200)) + planar.check(n_draws=200).to_markdown()
    assert "local planar coordinates in metres (no CRS)" in text
    for word in ("EPSG", "UTM", "WGS"):
        assert word not in text
    assert "EPSG:32633" in str(utm.check(n_draws=200))


def test_row_numbers_and_id_columns(tmp_path):
    frame = street_layer(with_id=True)
    path = tmp_path / "streets.gpkg"
    write_layer(frame, path)
    numbered = Design.from_spec(spec_for(path, metric="euclidean"))
    assert numbered.units.ids.name == "row"
    assert list(numbered.units.ids) == list(range(len(frame)))
    data = spec_for(path, metric="euclidean").to_dict()
    data["units"] = {"path": str(path), "planar": "m", "id_column": "segment_id"}
    keyed = Design.from_spec(DesignSpec.from_dict(data))
    assert list(keyed.units.ids[:2]) == ["s000", "s001"]
    doubled = frame.copy()
    doubled.loc[[3, 9], "segment_id"] = "s001"
    write_layer(doubled, tmp_path / "doubled.gpkg")
    data["units"]["path"] = str(tmp_path / "doubled.gpkg")
    with pytest.raises(InputError, match="s001"):
        Design.from_spec(DesignSpec.from_dict(data))
    taken = frame.rename(columns={"kind": "row"})
    write_layer(taken, tmp_path / "taken.gpkg")
    with pytest.raises(InputError, match="already has a column 'row'"):
        Design.from_spec(spec_for(tmp_path / "taken.gpkg", metric="euclidean"))


@pytest.mark.parametrize(
    ("units", "exposure", "message"),
    [
        ({"number_rows": "yes"}, {}, "true or false"),
        ({"number_rows": True, "id_column": "segment_id"}, {}, "not both"),
        ({"id_column": "segment_id", "number_rows": False, "planar": "km"}, {}, "'m', 'ft'"),
        ({"number_rows": True, "crs": "EPSG:32633"}, {}, "crs .* or planar"),
        ({"number_rows": True}, {"metric": "euclidean", "split_at_crossings": True}, "network"),
        ({"number_rows": True}, {"split_at_crossings": 1}, "true or false"),
        ({"number_rows": True}, {"bridge_column": ""}, "non-empty text"),
    ],
)
def test_spec_keys_checked(units, exposure, message):
    data = {
        "name": "x",
        "seed": 1,
        "units": {"path": "streets.gpkg", "planar": "m", **units},
        "assignment": {"treated": 2},
        "exposure": {"metric": "network", **exposure},
    }
    with pytest.raises(DesignError, match=message):
        DesignSpec.from_dict(data)
