"""Tests of the invented sample city (geoexp.sampleregion: _city, _settings, _streets, _land)."""

from __future__ import annotations

import geopandas as gpd
import networkx as nx
import numpy as np
import pandas as pd
import pyogrio
import pyproj
import pytest
import shapely
from scipy.stats import spearmanr

from geoexp.errors import InputError
from geoexp.sampleregion import SampleRegion, _city, _settings, load_sample_region, make_city

SHIPPED = _city.DEFAULT_PATH


@pytest.fixture(scope="module")
def region() -> SampleRegion:
    return load_sample_region()


@pytest.fixture(scope="module")
def fresh() -> SampleRegion:
    return make_city()


def _year(incidents: gpd.GeoDataFrame, year: int) -> gpd.GeoDataFrame:
    return incidents[incidents["date"].dt.year == year]


# --- the shipped file ---------------------------------------------------------


def test_load_reads_the_shipped_file(region):
    assert SHIPPED.exists()
    assert region.path == str(SHIPPED)
    # independent reader: pyogrio's own layer listing and feature counts
    layers = dict(pyogrio.list_layers(SHIPPED))
    assert set(_city.LAYERS) <= set(layers)
    for layer in _city.LAYERS:
        assert len(getattr(region, layer)) == pyogrio.read_info(SHIPPED, layer=layer)["features"]
    assert layers["segments"] == "LineString"
    assert layers["parcels"] == "Polygon"
    assert layers["incidents"] == "Point"


def test_shipped_file_is_small():
    assert SHIPPED.stat().st_size < 6_000_000  # "a few MB at most"


def test_make_city_reproduces_the_shipped_data(region, fresh):
    a, b = region.segments, fresh.segments
    assert len(a) == len(b)
    assert a["segment_id"].tolist() == b["segment_id"].tolist()
    assert shapely.equals_exact(a.geometry.values, b.geometry.values, tolerance=1e-6).all()
    for col in ("street", "description", "district", "land_use"):
        assert a[col].tolist() == b[col].tolist(), col
    np.testing.assert_array_equal(a["incidents_y1"], b["incidents_y1"])
    np.testing.assert_array_equal(a["incidents_y2"], b["incidents_y2"])
    for layer in ("parcels", "districts", "incidents", "features"):
        assert len(getattr(region, layer)) == len(getattr(fresh, layer)), layer
    pts_a, pts_b = region.incidents.geometry.values, fresh.incidents.geometry.values
    assert shapely.equals_exact(pts_a, pts_b, tolerance=1e-6).all()
    assert (region.incidents["date"] == fresh.incidents["date"]).all()


def test_generated_and_loaded_layers_have_the_same_columns_and_dtypes(region, fresh):
    for layer in _city.LAYERS:
        a, b = getattr(region, layer), getattr(fresh, layer)
        pd.testing.assert_series_equal(a.dtypes, b.dtypes, obj=layer)
        assert isinstance(a.index, pd.RangeIndex)
    assert region.incidents["date"].dtype == np.dtype("datetime64[ns]")


def test_missing_shipped_file_regenerates_the_same_city(region, monkeypatch, tmp_path):
    monkeypatch.setattr(_city, "DEFAULT_PATH", tmp_path / "absent.gpkg")
    again = load_sample_region()
    assert again.path is None
    assert again.segments["segment_id"].tolist() == region.segments["segment_id"].tolist()
    np.testing.assert_array_equal(again.segments["incidents_y1"], region.segments["incidents_y1"])


def test_explicit_missing_path_is_an_input_error(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        load_sample_region(tmp_path / "nowhere.gpkg")


def test_write_and_read_round_trip(tmp_path):
    small = make_city(7, n_segments_target=600)
    path = _city.write_sample_region(small, tmp_path / "small.gpkg")
    back = load_sample_region(path)
    assert back.path == str(path)
    assert shapely.equals_exact(
        back.segments.geometry.values, small.segments.geometry.values, tolerance=0
    ).all()
    pd.testing.assert_frame_equal(
        back.segments.drop(columns="geometry"), small.segments.drop(columns="geometry")
    )


# --- place and shape ----------------------------------------------------------


def test_crs_and_place_in_the_open_ocean(region):
    for layer in _city.LAYERS:
        assert getattr(region, layer).crs == pyproj.CRS("EPSG:32727"), layer
    x, y = region.segments.geometry.union_all().centroid.coords[0]
    assert abs(x - 500_000) < 1_000 and abs(y - 6_700_000) < 1_000
    # pyproj: UTM zone 27S, central meridian 21 W; northing 6.7e6 is about 29.8 S,
    # open South Atlantic, far from any coast
    lon, lat = pyproj.Transformer.from_crs(32727, 4326, always_xy=True).transform(x, y)
    assert -22 < lon < -20 and -31 < lat < -29


def test_segment_count_and_block_sizes(region):
    assert 3000 <= len(region.segments) <= 4000
    med = region.segments["length_m"].median()
    assert 80 <= med <= 160  # blocks of 80-160 m, per the spec


def test_segment_count_follows_the_target():
    small = make_city(3, n_segments_target=800)
    assert 600 <= len(small.segments) <= 1000
    assert small.segments["segment_id"].tolist() != []


def test_different_seeds_give_different_cities(fresh):
    other = make_city(99)
    assert (
        len(other.segments) != len(fresh.segments)
        or not shapely.equals_exact(
            other.segments.geometry.values, fresh.segments.geometry.values, tolerance=1e-6
        ).all()
    )


def test_target_too_small_is_refused():
    with pytest.raises(ValueError, match="n_segments_target"):
        make_city(n_segments_target=10)


# --- segments -----------------------------------------------------------------


def test_segment_ids_unique_and_columns_filled(region):
    seg = region.segments
    assert seg["segment_id"].is_unique
    assert seg["segment_id"].str.fullmatch(r"S\d{5}").all()
    for col in ("street", "from_street", "to_street", "description", "district", "land_use"):
        assert (seg[col].str.len() > 0).all(), col
    assert set(seg["land_use"]) <= set(_settings.LAND_USES)
    assert (seg.geometry.geom_type == "LineString").all()
    # geopandas computes length independently of the generator's column
    np.testing.assert_allclose(seg["length_m"], seg.geometry.length, rtol=1e-12)
    assert (seg["length_m"] > 5).all()


def test_descriptions_name_the_cross_streets(region):
    seg = region.segments
    dead = (seg["from_street"] == "dead end") | (seg["to_street"] == "dead end")
    between = seg["street"] + " between " + seg["from_street"] + " and " + seg["to_street"]
    assert (seg.loc[~dead, "description"] == between[~dead]).all()
    named = seg["from_street"].where(seg["from_street"] != "dead end", seg["to_street"])
    assert (
        seg.loc[dead, "description"] == (seg["street"] + " from " + named + " to dead end")[dead]
    ).all()
    assert 0.01 * len(seg) < dead.sum() < 0.15 * len(seg)  # "some cul-de-sacs"
    assert not ((seg["from_street"] == "dead end") & (seg["to_street"] == "dead end")).any()


def test_every_segment_lies_in_its_district(region):
    seg, districts = region.segments, region.districts
    assert 6 <= len(districts) <= 10
    assert districts["district"].is_unique
    mid = gpd.GeoDataFrame(
        {"segment_id": seg["segment_id"], "district": seg["district"]},
        geometry=seg.geometry.interpolate(0.5, normalized=True),
        crs=seg.crs,
    )
    # geopandas sjoin: the district polygon that contains each midpoint
    hit = gpd.sjoin(mid, districts.rename(columns={"district": "polygon"}), predicate="within")
    assert hit["segment_id"].is_unique and len(hit) == len(seg)
    assert (hit["district"] == hit["polygon"]).all()


def test_network_is_connected(region):
    # networkx: the graph whose nodes are segment endpoints has one component
    g = nx.Graph()
    ends = shapely.get_coordinates(
        np.concatenate(
            [
                shapely.get_point(region.segments.geometry.values, 0),
                shapely.get_point(region.segments.geometry.values, -1),
            ]
        )
    )
    n = len(region.segments)
    g.add_edges_from(zip(map(tuple, ends[:n]), map(tuple, ends[n:]), strict=True))
    assert nx.number_connected_components(g) == 1
    degree = np.array([d for _, d in g.degree()])
    assert (degree >= 3).sum() > 0.5 * g.number_of_nodes()  # a grid: mostly real intersections


def test_network_is_noded(region):
    # shapely/GEOS: no two segments cross or overlap; where they meet, they meet
    # at endpoints, so the diagonal avenue is split wherever it crosses a street
    geoms = region.segments.geometry.values
    tree = shapely.STRtree(geoms)
    assert tree.query(geoms, predicate="crosses").size == 0
    assert tree.query(geoms, predicate="overlaps").size == 0
    i, j = tree.query(geoms, predicate="intersects")
    i, j = i[i < j], j[i < j]
    meet = shapely.intersection(geoms[i], geoms[j])
    ends = shapely.union(shapely.boundary(geoms[i]), shapely.boundary(geoms[j]))
    assert shapely.covers(ends, meet).all()


def test_river_and_rail_have_few_crossings(region):
    feats = region.features.set_index("kind")
    assert feats.loc["river"].geometry.geom_type == "Polygon"
    assert feats.loc["rail"].geometry.geom_type == "LineString"
    assert set(feats["name"]) == {"Quill River", "Tansy Line"}
    seg = region.segments.geometry.values
    assert 3 <= shapely.intersects(seg, feats.loc["river"].geometry).sum() <= 4
    assert 2 <= shapely.intersects(seg, feats.loc["rail"].geometry).sum() <= 5


# --- parcels ------------------------------------------------------------------


def test_parcels(region):
    par = region.parcels
    assert par["parcel_id"].is_unique and par["address"].is_unique
    assert (par.geometry.geom_type == "Polygon").all()
    assert par.geometry.is_valid.all()
    assert set(par["land_use"]) == set(_settings.LAND_USES)
    assert set(par["district"]) <= set(region.districts["district"])
    assert par["address"].str.fullmatch(r"\d+ .+").all()
    # parcels tile blocks: several per block and none overlap (shapely STRtree)
    assert len(par) > 2 * len(region.segments)
    geoms = par.geometry.values
    assert shapely.STRtree(geoms).query(geoms, predicate="overlaps").size == 0
    # inset from the street centre lines (6 m in the generator; 5 m leaves slack)
    near = shapely.STRtree(region.segments.geometry.values).query(
        geoms, predicate="dwithin", distance=5.0
    )
    assert near.size == 0


# --- incidents ----------------------------------------------------------------


def test_incident_columns(region):
    inc = region.incidents
    assert 12_000 <= len(inc) <= 20_000
    assert inc["incident_id"].is_unique
    assert set(inc["incident_type"]) == set(_settings.INCIDENT_TYPES)
    assert inc["date"].min() >= pd.Timestamp("2024-01-01")
    assert inc["date"].max() <= pd.Timestamp("2025-12-31")
    assert (inc["date"] == inc["date"].dt.normalize()).all()
    assert (inc.geometry.geom_type == "Point").all()


@pytest.mark.parametrize(("year", "column"), [(2024, "incidents_y1"), (2025, "incidents_y2")])
def test_counts_agree_with_snapping_to_nearest_segment(region, year, column):
    seg = region.segments
    pts = _year(region.incidents, year)
    # geopandas sjoin_nearest is the external reference for snapping (30 m)
    joined = gpd.sjoin_nearest(pts, seg[["segment_id", "geometry"]], max_distance=30.0)
    assert joined.index.is_unique  # no ties between equally near segments
    counts = joined["segment_id"].value_counts().reindex(seg["segment_id"], fill_value=0)
    np.testing.assert_array_equal(counts.to_numpy(), seg[column].to_numpy())
    assert seg[column].sum() < len(pts)  # some points lie beyond the tolerance


def test_about_one_percent_off_the_network(region):
    seg = region.segments[["segment_id", "geometry"]]
    joined = gpd.sjoin_nearest(region.incidents, seg, distance_col="d")
    d = joined.groupby(level=0)["d"].first()
    off = d > 40.0
    assert 0.005 < off.mean() < 0.02
    # the rest lie within a few metres of a street (offset 0-12 m)
    assert d[~off].max() <= 12.0 + 1e-6


def test_law_of_crime_concentration(region):
    # common practice (Weisburd 2015, Criminology 53(2)): about half of all
    # incidents on about 5% of street segments; the spec allows 40-60%
    total = (region.segments["incidents_y1"] + region.segments["incidents_y2"]).to_numpy()
    top = np.sort(total)[::-1][: int(np.ceil(0.05 * len(total)))]
    share = top.sum() / total.sum()
    assert 0.40 <= share <= 0.60
    # most segments see few or none
    assert (total == 0).mean() > 0.25


def test_hot_spots_are_stable_across_years(region):
    seg = region.segments
    # scipy.stats.spearmanr: ranks agree across years when risk is shared
    rho = spearmanr(seg["incidents_y1"], seg["incidents_y2"]).statistic
    assert rho > 0.5
    top1 = set(seg.nlargest(100, "incidents_y1")["segment_id"])
    top2 = set(seg.nlargest(100, "incidents_y2")["segment_id"])
    assert len(top1 & top2) > 50
    # two years of similar size
    ratio = seg["incidents_y2"].sum() / seg["incidents_y1"].sum()
    assert 0.85 < ratio < 1.15
