"""Tests of geoexp.units: reading, validation, CRS policy and eligibility."""

from __future__ import annotations

import dataclasses
import math

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import pytest
import shapely
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from shapely.geometry import LineString, Point, Polygon

from geoexp.errors import CRSError, GeometryError, InputError
from geoexp.units import UnitSet

UTM_18N = "EPSG:32618"
GEOD = pyproj.Geod(ellps="WGS84")


def grid_segments(n: int = 12, crs: str = UTM_18N, x0: float = 500_000.0, y0: float = 4_500_000.0):
    """A row of horizontal 100 m segments, 50 m apart, with ids 1..n and a count column."""
    xs = x0 + 150.0 * np.arange(n)
    lines = [LineString([(x, y0), (x + 100.0, y0)]) for x in xs]
    return gpd.GeoDataFrame(
        {
            "seg_id": np.arange(1, n + 1),
            "incidents": np.arange(n) % 4,
            "zone": np.where(np.arange(n) % 2 == 0, "a", "b"),
        },
        geometry=lines,
        crs=crs,
    )


def square(x: float, y: float, side: float = 10.0) -> Polygon:
    return Polygon([(x, y), (x + side, y), (x + side, y + side), (x, y + side)])


# --------------------------------------------------------------------------- reading


@pytest.mark.parametrize(
    ("ext", "driver"), [("gpkg", "GPKG"), ("geojson", "GeoJSON"), ("shp", None)]
)
def test_reads_each_format_and_projects(tmp_path, ext, driver):
    lon_lat = grid_segments(6).to_crs(4326)
    path = tmp_path / f"streets.{ext}"
    lon_lat.to_file(path, driver=driver, engine="pyogrio")
    units = UnitSet.from_file(path, "seg_id")
    assert units.kind == "segment"
    assert units.source == str(path)
    assert list(units.ids) == [1, 2, 3, 4, 5, 6]
    assert units.ids.name == "seg_id" and units.id_column == "seg_id"
    assert units.crs.equals(pyproj.CRS(UTM_18N))  # the UTM zone of longitude -75..-72
    assert units.metres_per_unit == 1.0
    assert "seg_id" not in units.frame.columns and "incidents" in units.frame.columns
    # Lengths back in the UTM zone they were drawn in (source: pyproj round trip, 100 m each).
    np.testing.assert_allclose(units.geometry.length.to_numpy(), 100.0, rtol=1e-6)


def test_missing_file_is_named(tmp_path):
    path = tmp_path / "nowhere.gpkg"
    with pytest.raises(InputError, match="nowhere.gpkg.*does not exist"):
        UnitSet.from_file(path, "seg_id")


def test_unreadable_file_is_named(tmp_path):
    path = tmp_path / "broken.gpkg"
    path.write_text("this is not a geopackage")
    with pytest.raises(InputError, match="could not read the units file .*broken.gpkg"):
        UnitSet.from_file(path, "seg_id")


def test_wrong_layer_lists_layers(tmp_path):
    path = tmp_path / "city.gpkg"
    grid_segments(4).to_file(path, layer="streets", engine="pyogrio")
    grid_segments(4).to_file(path, layer="old_streets", engine="pyogrio")
    with pytest.raises(InputError, match="city.gpkg.*no layer 'roads'.*'streets', 'old_streets'"):
        UnitSet.from_file(path, "seg_id", layer="roads")
    with pytest.raises(InputError, match="2 layers.*'streets', 'old_streets'.*layer="):
        UnitSet.from_file(path, "seg_id")
    units = UnitSet.from_file(path, "seg_id", layer="old_streets")
    assert units.n == 4 and units.source == str(path)
    assert "city.gpkg (layer old_streets)" in units.notes[0]


# the shapefile driver cuts field names to 10 characters, with warnings
@pytest.mark.filterwarnings("ignore:.*(laundered|10 characters|truncated).*")
def test_id_column_not_found_lists_columns(tmp_path):
    path = tmp_path / "streets.shp"
    frame = grid_segments(4).rename(columns={"seg_id": "segment_id_x"})
    frame.to_file(path, engine="pyogrio")
    with pytest.raises(InputError) as err:
        UnitSet.from_file(path, "segment_id_x")
    message = str(err.value)
    assert "streets.shp" in message and "'segment_id_x'" in message
    assert "'segment_id', 'incidents', 'zone'" in message
    assert "did you mean 'segment_id'" in message


# --------------------------------------------------------------------------- ids


def test_null_ids_are_named_by_row(tmp_path):
    frame = grid_segments(5)
    frame["name"] = pd.Series(["s1", None, "s3", None, "s5"], dtype=object)
    path = tmp_path / "streets.gpkg"
    frame.to_file(path, engine="pyogrio")
    with pytest.raises(InputError) as err:
        UnitSet.from_file(path, "name")
    message = str(err.value)
    assert "2 units have no id" in message
    assert "'name'" in message and "streets.gpkg" in message and "rows 1, 3" in message


def test_nan_ids_from_shapefile_say_why_they_are_decimals(tmp_path):
    frame = grid_segments(5)
    frame["seg_id"] = [1.0, 2.0, np.nan, 4.0, 5.0]
    path = tmp_path / "streets.shp"
    frame.to_file(path, engine="pyogrio")
    with pytest.raises(InputError) as err:
        UnitSet.from_file(path, "seg_id")
    message = str(err.value)
    assert "streets.shp" in message and "'seg_id'" in message and "rows 2 " in message
    assert "decimal numbers" in message


def test_empty_string_ids_are_missing(tmp_path):
    frame = grid_segments(4)
    frame["code"] = ["A", "", "  ", "D"]
    path = tmp_path / "streets.geojson"
    frame.to_file(path, driver="GeoJSON", engine="pyogrio")
    with pytest.raises(
        InputError, match=r"2 units have no id in column 'code' of .*streets.geojson.*rows 1, 2"
    ):
        UnitSet.from_file(path, "code")


def test_integer_like_float_ids_become_integers_with_a_note(tmp_path):
    frame = grid_segments(4)
    frame["seg_id"] = frame["seg_id"].astype(float)
    path = tmp_path / "streets.shp"
    frame.to_file(path, engine="pyogrio")
    units = UnitSet.from_file(path, "seg_id")
    assert units.ids.dtype == np.int64
    assert list(units.ids) == [1, 2, 3, 4]
    assert any("decimal numbers" in note for note in units.notes)


def test_fractional_and_mixed_ids_are_refused():
    frame = grid_segments(4)
    frame["seg_id"] = [1.0, 2.5, 3.0, 4.25]
    with pytest.raises(InputError, match="fractional.*rows 1, 3"):
        UnitSet.from_frame(frame, "seg_id")
    frame["seg_id"] = pd.Series([1, "b", 3, 4], dtype=object)
    with pytest.raises(InputError, match="mix types.*str at rows 1"):
        UnitSet.from_frame(frame, "seg_id")


def test_duplicate_ids_are_named(tmp_path):
    frame = grid_segments(6)
    frame["seg_id"] = [7, 8, 7, 9, 8, 10]
    path = tmp_path / "streets.gpkg"
    frame.to_file(path, engine="pyogrio")
    with pytest.raises(InputError) as err:
        UnitSet.from_file(path, "seg_id")
    message = str(err.value)
    assert "2 ids appear more than once" in message and "'seg_id'" in message
    assert "streets.gpkg" in message and "7, 8" in message and "rows 0, 1, 2, 4" in message


@pytest.mark.parametrize("ids", [[10, 20, 30], ["n-1", "n-2", "n-3"], ["Åsgård", "Żółć", "東京-7"]])
def test_id_types_survive_a_file_round_trip(tmp_path, ids):
    frame = grid_segments(3)
    frame["uid"] = ids
    path = tmp_path / "streets.gpkg"
    frame.to_file(path, engine="pyogrio")
    units = UnitSet.from_file(path, "uid")
    assert list(units.ids) == ids
    assert type(units.ids[0]) is type(ids[0]) or isinstance(units.ids[0], np.integer)
    picked = units.subset([ids[2], ids[0]])
    assert list(picked.ids) == [ids[2], ids[0]]


def test_index_ids_are_used_when_no_column_is_named():
    frame = grid_segments(3).set_index(pd.Index(["ß-1", "ß-2", "ß-3"], name="segment"))
    units = UnitSet.from_frame(frame)
    assert list(units.ids) == ["ß-1", "ß-2", "ß-3"] and units.id_column == "segment"
    assert "seg_id" in units.frame.columns


# --------------------------------------------------------------------------- geometry


def test_empty_and_null_geometries_are_named():
    frame = grid_segments(5)
    frame.loc[1, "geometry"] = None
    frame.loc[3, "geometry"] = LineString()
    with pytest.raises(
        GeometryError, match="2 units in 'roads' have missing or empty geometry: ids 2, 4"
    ):
        UnitSet.from_frame(frame, "seg_id", source="roads")


def test_points_are_refused():
    frame = gpd.GeoDataFrame({"uid": [1, 2]}, geometry=[Point(0, 0), Point(5, 5)], crs=UTM_18N)
    with pytest.raises(
        GeometryError, match="street segments .* or parcels .*2 units in 'pts' are points: ids 1, 2"
    ):
        UnitSet.from_frame(frame, "uid", source="pts")


def test_mixed_lines_and_polygons_are_refused(tmp_path):
    lines = grid_segments(4)
    polys = gpd.GeoDataFrame(
        {"seg_id": [98, 99]}, geometry=[square(0, 0), square(20, 0)], crs=UTM_18N
    )
    frame = pd.concat([lines[["seg_id", "geometry"]], polys], ignore_index=True)
    path = tmp_path / "mixed.geojson"
    frame.to_file(path, driver="GeoJSON", engine="pyogrio")
    with pytest.raises(
        GeometryError, match=r"mixed.geojson' mixes 4 lines and 2 polygons.*ids 98, 99"
    ):
        UnitSet.from_file(path, "seg_id")


def test_geometry_column_is_renamed_and_plain_frames_refused():
    frame = grid_segments(3).rename_geometry("geom")
    units = UnitSet.from_frame(frame, "seg_id")
    assert units.frame.geometry.name == "geometry" and "geom" not in units.frame.columns
    with pytest.raises(InputError, match="must be a geopandas GeoDataFrame, got DataFrame"):
        UnitSet.from_frame(pd.DataFrame({"seg_id": [1]}), "seg_id")


def test_kind_must_match():
    with pytest.raises(GeometryError, match="kind='parcel'"):
        UnitSet.from_frame(grid_segments(2), "seg_id", kind="parcel")


def test_invalid_polygons_are_repaired_keeping_the_polygonal_part():
    bow_tie = Polygon([(0, 0), (10, 10), (10, 0), (0, 10)])
    frame = gpd.GeoDataFrame(
        {"pid": ["p1", "p2", "p3"]}, geometry=[square(20, 0), bow_tie, square(40, 0)], crs=UTM_18N
    )
    units = UnitSet.from_frame(frame, "pid")
    assert units.kind == "parcel" and units.repaired == 1
    assert any("repaired 1 invalid" in note and "'p2'" in note for note in units.notes)
    fixed = units.geometry.loc["p2"]
    assert fixed.is_valid and fixed.geom_type in ("Polygon", "MultiPolygon")
    # Reference: shapely.make_valid itself splits a bow tie into two triangles of area 25 each.
    assert fixed.area == pytest.approx(shapely.make_valid(bow_tie).area) == pytest.approx(50.0)


def test_polygon_without_area_after_repair_is_refused():
    flat = Polygon([(0, 0), (5, 5), (10, 10)])  # make_valid turns it into a line
    frame = gpd.GeoDataFrame({"pid": [1, 2]}, geometry=[square(20, 0), flat], crs=UTM_18N)
    with pytest.raises(GeometryError, match="no area left.*ids 2"):
        UnitSet.from_frame(frame, "pid")


# --------------------------------------------------------------------------- CRS


@pytest.mark.filterwarnings("ignore:'crs' was not provided")
def test_missing_crs_asks_for_one(tmp_path):
    frame = grid_segments(3).set_crs(None, allow_override=True)
    path = tmp_path / "nocrs.shp"
    frame.to_file(path, engine="pyogrio")
    with pytest.raises(CRSError, match=r"nocrs.shp' has no CRS.*crs="):
        UnitSet.from_file(path, "seg_id")
    units = UnitSet.from_file(path, "seg_id", crs=UTM_18N)
    assert units.crs.equals(pyproj.CRS(UTM_18N))
    assert "taken from crs=" in units.crs_report


def test_crs_argument_must_agree_with_the_layer():
    frame = grid_segments(3)
    with pytest.raises(CRSError, match="UTM zone 18N.*crs= says.*EPSG:2263"):
        UnitSet.from_frame(frame, "seg_id", crs="EPSG:2263")
    assert UnitSet.from_frame(frame, "seg_id", crs=32618).n == 3


# Places on both sides of the equator and of the prime meridian, including one on the
# edge of its UTM zone (lon 5.9) where the UTM scale error is largest.
PLACES = [(-74.0, 40.7), (151.2, -33.9), (18.4, -33.9), (-58.4, -34.6), (5.9, 52.0), (100.5, 1.3)]


def _geodesic_check(lon: float, lat: float, bearings: np.ndarray, lengths: np.ndarray):
    """Build segments from the geodesic forward problem, check projected lengths."""
    ends_lon, ends_lat, _ = GEOD.fwd(
        np.full(len(bearings), lon), np.full(len(bearings), lat), bearings, lengths
    )
    lines = [LineString([(lon, lat), (x, y)]) for x, y in zip(ends_lon, ends_lat, strict=True)]
    frame = gpd.GeoDataFrame({"uid": np.arange(len(lines))}, geometry=lines, crs=4326)
    units = UnitSet.from_frame(frame, "uid")
    assert units.crs.is_projected and "UTM zone" in units.crs.name
    projected = units.geometry.length.to_numpy() * units.metres_per_unit
    # [L] Reference: pyproj.Geod(ellps="WGS84").inv geodesic lengths; a UTM zone's scale
    # error stays within 0.5 % for segments of a few hundred metres (common practice).
    _, _, geodesic = GEOD.inv(
        np.full(len(lines), lon), np.full(len(lines), lat), ends_lon, ends_lat
    )
    np.testing.assert_allclose(projected, geodesic, rtol=0.005)
    return units


@pytest.mark.parametrize(("lon", "lat"), PLACES)
def test_geographic_layer_is_projected_to_utm(lon, lat):
    bearings = np.array([0.0, 45.0, 90.0, 200.0, 315.0])
    units = _geodesic_check(lon, lat, bearings, np.array([150.0, 300.0, 450.0, 600.0, 800.0]))
    hemisphere = "N" if lat >= 0 else "S"
    zone = int((lon + 180) // 6) + 1  # UTM zone numbering, common practice
    assert f"UTM zone {zone}{hemisphere}" in units.crs.name
    assert "EPSG:4326" in units.crs_report and f"UTM zone {zone}{hemisphere}" in units.crs_report


@settings(max_examples=25, deadline=None)
@given(
    lon=st.floats(-179.0, 179.0),
    lat=st.floats(-79.0, 83.0),
    bearing=st.floats(0.0, 360.0),
    length=st.floats(100.0, 900.0),
)
def test_projected_lengths_match_geodesics_anywhere(lon, lat, bearing, length):
    _geodesic_check(lon, lat, np.array([bearing]), np.array([length]))


def test_web_mercator_is_reprojected():
    lon, lat = 10.0, 60.0
    frame = gpd.GeoDataFrame(
        {"uid": [1]}, geometry=[LineString([(lon, lat), (lon + 0.005, lat + 0.002)])], crs=4326
    ).to_crs(3857)
    units = UnitSet.from_frame(frame, "uid")
    assert "Mercator" in units.crs_report and "UTM zone 32N" in units.crs.name
    # Reference: pyproj.Geod inverse; Web Mercator lengths would be about 2x too long at 60N.
    _, _, geodesic = GEOD.inv(lon, lat, lon + 0.005, lat + 0.002)
    assert units.geometry.length.iloc[0] == pytest.approx(geodesic, rel=0.005)


def test_feet_crs_is_kept_with_metres_per_unit(tmp_path):
    frame = gpd.GeoDataFrame(
        {"uid": [1, 2]},
        geometry=[
            LineString([(-73.95, 40.75), (-73.947, 40.752)]),
            LineString([(-73.9, 40.7), (-73.9, 40.703)]),
        ],
        crs=4326,
    ).to_crs(2263)
    path = tmp_path / "feet.gpkg"
    frame.to_file(path, engine="pyogrio")
    units = UnitSet.from_file(path, "uid")
    assert units.crs.to_epsg() == 2263
    # Source: pyproj axis unit of EPSG:2263 (US survey foot = 1200/3937 m by definition).
    assert units.metres_per_unit == pytest.approx(0.3048006096, abs=1e-10)
    assert units.metres_per_unit == pytest.approx(1200 / 3937, rel=1e-12)
    assert "kept" in units.crs_report and "US survey foot" in units.crs_report
    np.testing.assert_allclose(
        shapely.get_coordinates(units.geometry.array), shapely.get_coordinates(frame.geometry.array)
    )
    # Reference: pyproj.Geod inverse on the original lon/lat (state plane scale error < 0.1 %).
    _, _, geodesic = GEOD.inv([-73.95, -73.9], [40.75, 40.7], [-73.947, -73.9], [40.752, 40.703])
    np.testing.assert_allclose(units.geometry.length * units.metres_per_unit, geodesic, rtol=0.001)


def test_international_feet():
    frame = grid_segments(2).to_crs(2222)  # NAD83 / Arizona East (ft): international foot
    units = UnitSet.from_frame(frame, "seg_id")
    assert units.metres_per_unit == 0.3048  # international foot, exact by definition (from memory)


# --------------------------------------------------------------------------- immutability


def test_callers_frame_is_not_mutated():
    frame = gpd.GeoDataFrame(
        {"pid": [3, 1, 2], "count": [5, 9, 1]},
        geometry=[
            square(-74.0, 40.7, 0.001),
            Polygon([(0, 0), (1, 1), (1, 0), (0, 1)]),
            square(-74.01, 40.7, 0.001),
        ],
        crs=4326,
    )
    # the bow tie needs repair, the CRS needs projecting; neither may reach the caller.
    frame.loc[1, "geometry"] = Polygon(
        [(-74.0, 40.7), (-73.999, 40.701), (-73.999, 40.7), (-74.0, 40.701)]
    )
    before = frame.copy()
    units = UnitSet.from_frame(frame, "pid")
    top = units.top("count", k=2)
    top.frame.loc[3, "count"] = 100
    pd.testing.assert_frame_equal(frame.drop(columns="geometry"), before.drop(columns="geometry"))
    assert frame.geometry.geom_equals_exact(before.geometry, tolerance=0).all()
    assert frame.crs == before.crs and frame.index.equals(before.index)
    assert units.frame.loc[3, "count"] == 5  # the new UnitSet owns its own frame
    with pytest.raises(dataclasses.FrozenInstanceError):
        units.kind = "segment"


# --------------------------------------------------------------------------- eligibility


def test_top_k_breaks_ties_by_id_and_says_so():
    frame = grid_segments(8)
    frame["seg_id"] = [40, 10, 30, 20, 50, 60, 70, 80]
    frame["incidents"] = [9, 5, 5, 5, 1, 7, 5, 0]
    units = UnitSet.from_frame(frame, "seg_id")
    top = units.top("incidents", k=4)
    # count 9 and 7 first, then two of the four units tied at 5 (ids 10, 20, 30, 70): 10 and 20.
    assert sorted(top.ids) == [10, 20, 40, 60]
    assert list(top.ids) == [40, 10, 20, 60]  # layer order is kept
    assert "4 units were tied at the cut-off value 5" in top.notes[-2]
    assert top.notes[-1] == "kept 4 of 8 units: top 4 by 'incidents'"
    assert units.notes == top.notes[: len(units.notes)]
    assert "no ties" in units.top("incidents", k=2).notes[-2]


def test_top_share_rounds_up():
    units = UnitSet.from_frame(grid_segments(10), "seg_id")
    assert units.top("incidents", share=0.25).n == 3  # ceil(2.5)
    assert units.top("incidents", share=0.7).n == 7  # 0.7 * 10 is 7.000000000000001 in floats
    assert units.top("incidents", share=1.0).n == 10


def test_top_refuses_bad_arguments():
    frame = grid_segments(6)
    frame["incidents"] = pd.Series([1, "x", 3, None, 5, 6], dtype=object)
    units = UnitSet.from_frame(frame, "seg_id")
    with pytest.raises(
        InputError, match=r"'incidents'.*2 units have missing or non-numeric.*ids 2, 4"
    ):
        units.top("incidents", k=2)
    units = UnitSet.from_frame(grid_segments(6), "seg_id")
    with pytest.raises(InputError, match="k=7 is larger than the number of units"):
        units.top("incidents", k=7)
    for k in (0, -1, 2.5, True):
        with pytest.raises(InputError, match="k must be"):
            units.top("incidents", k=k)
    for share in (0.0, 1.5, -0.1, float("nan")):
        with pytest.raises(InputError, match=r"share must be a fraction in \(0, 1\]"):
            units.top("incidents", share=share)
    with pytest.raises(InputError, match="exactly one"):
        units.top("incidents", k=2, share=0.5)
    with pytest.raises(InputError, match="no column 'crimes'.*'incidents'"):
        units.top("crimes", k=2)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    data=st.data(),
    counts=st.lists(st.integers(0, 4), min_size=1, max_size=40),
)
def test_top_k_property(data, counts):
    n = len(counts)
    k = data.draw(st.integers(1, n))
    ids = data.draw(st.permutations(list(range(100, 100 + n))))
    frame = gpd.GeoDataFrame(
        {"uid": ids, "c": counts}, geometry=[Point(i, 0).buffer(0.4) for i in range(n)], crs=UTM_18N
    )
    top = UnitSet.from_frame(frame, "uid").top("c", k=k)
    kept = set(top.ids)
    assert top.n == k
    dropped = [c for i, c in zip(ids, counts, strict=True) if i not in kept]
    assert min(top.frame["c"]) >= max(dropped, default=-1)
    # Reference: the documented tie policy computed with Python's sorted (count desc, id asc).
    expected = sorted(zip(counts, ids, strict=True), key=lambda t: (-t[0], t[1]))[:k]
    assert kept == {i for _, i in expected}


def test_select_by_rule_and_mask():
    units = UnitSet.from_frame(grid_segments(8), "seg_id")
    picked = units.select("zone == 'a' and incidents >= 2")
    assert list(picked.ids) == [3, 7]
    assert "rule \"zone == 'a' and incidents >= 2\"" in picked.notes[-1]
    assert list(units.select("seg_id > 6").ids) == [7, 8]  # the id is usable in rules
    mask = pd.Series(units.ids % 2 == 0, index=units.ids).iloc[::-1]  # alignment by id
    assert list(units.select(mask).ids) == [2, 4, 6, 8]
    assert list(units.select(np.asarray(units.ids) > 5).ids) == [6, 7, 8]
    with pytest.raises(InputError, match="could not be evaluated.*'incidents'"):
        units.select("crimes > 3")
    with pytest.raises(InputError, match="must give true/false"):
        units.select("incidents + 1")
    with pytest.raises(InputError, match="no units .* would be left"):
        units.select("incidents > 100")
    with pytest.raises(InputError, match="length 8"):
        units.select(np.ones(3, dtype=bool))


def _zone_round_trip_units():
    # Units on a 10 x 10 grid of 20 m parcels, 100 m apart, in UTM 18N.
    xs, ys = np.meshgrid(500_000.0 + 100 * np.arange(10), 4_500_000.0 + 100 * np.arange(10))
    parcels = [square(x, y, 20.0) for x, y in zip(xs.ravel(), ys.ravel(), strict=True)]
    frame = gpd.GeoDataFrame(
        {"pid": [f"p{i:03d}" for i in range(100)]}, geometry=parcels, crs=UTM_18N
    )
    return UnitSet.from_frame(frame, "pid")


@pytest.mark.parametrize("how", ["intersects", "within"])
@pytest.mark.parametrize("ext", ["geojson", "gpkg"])
def test_exclusion_round_trip_from_web_map_zone(tmp_path, how, ext):
    units = _zone_round_trip_units()
    # The zone holds whole parcels (x 200-220) and cuts others (x 300-320) in two.
    zone_utm = Polygon(
        [(500_190, 4_500_250), (500_310, 4_500_250), (500_310, 4_500_650), (500_190, 4_500_650)]
    )
    zones = gpd.GeoDataFrame({"name": ["zone A"]}, geometry=[zone_utm], crs=UTM_18N).to_crs(4326)
    path = tmp_path / f"zones.{ext}"
    zones.to_file(path, engine="pyogrio")
    kept = units.exclude(path, how=how)
    # Reference: shapely predicates against the zone in the units' CRS.
    predicate = shapely.intersects if how == "intersects" else shapely.within
    hit = predicate(np.asarray(units.geometry.array), zone_utm)
    assert 0 < hit.sum() < units.n
    assert list(kept.ids) == list(units.ids[~hit])
    assert any("reprojected from WGS 84 (EPSG:4326)" in note for note in kept.notes)
    assert f"kept {units.n - hit.sum()} of 100 units" in kept.notes[-1]


def test_exclusion_zone_errors():
    units = _zone_round_trip_units()
    lines = gpd.GeoDataFrame(
        geometry=[square(0, 0), LineString([(0, 0), (1, 1)]), Point(3, 3)], crs=UTM_18N
    )
    with pytest.raises(GeometryError, match="must be polygons; 2 zones .* rows 1, 2"):
        units.exclude(lines)
    with pytest.raises(CRSError, match="no CRS.*EPSG:4326"):
        units.exclude(gpd.GeoSeries([square(500_000, 4_500_000)]))
    with pytest.raises(InputError, match="zones.geojson.*does not exist"):
        units.exclude("zones.geojson")
    with pytest.raises(InputError, match="how must be"):
        units.exclude(lines, how="touches")
    everything = gpd.GeoSeries([square(499_000, 4_499_000, 5_000)], crs=UTM_18N)
    with pytest.raises(InputError, match="would be left"):
        units.exclude(everything)
    # a zone in the same CRS is used as is, with no reprojection note
    kept = units.exclude(gpd.GeoSeries([square(499_990, 4_499_990, 40.0)], crs=UTM_18N))
    assert kept.n == 99 and not any("reprojected" in note for note in kept.notes)


def test_subset_errors():
    units = UnitSet.from_frame(grid_segments(4), "seg_id")
    with pytest.raises(InputError, match="not units.*99"):
        units.subset([1, 99])
    with pytest.raises(InputError, match="more than once: 2"):
        units.subset([2, 2])
    assert units.subset(3).n == 1
    assert math.isclose(units.subset([1]).metres_per_unit, 1.0)
