"""The field list for patrols: treated places only, the pack's numbers, coordinates, geo: links."""

from __future__ import annotations

import json
import re

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import pytest
import shapely
from typer.testing import CliRunner

from geoexp.briefing import field_list, geo_uri, plan_briefing, save_field_list
from geoexp.cli import app
from geoexp.trialfile import TrialFile

# RFC 5870 (Mayrhofer & Spanring 2010), section 3.3 ABNF without the optional parts:
#   geo-URI = "geo:" coordinates; coordinates = coord-a "," coord-b [ "," coord-c ]
#   coord-a = num (latitude), coord-b = num (longitude); num = [ "-" ] pnum
#   pnum = 1*DIGIT [ "." 1*DIGIT ]
GEO_URI = re.compile(r"^geo:(-?\d+(?:\.\d+)?),(-?\d+(?:\.\d+)?)$")


@pytest.fixture(scope="module")
def places(demo_outputs):
    return field_list(demo_outputs["trial"])


def test_only_treated_places_in_the_packs_numbering(places, demo_outputs):
    tf = TrialFile.open(demo_outputs["trial"])
    assign = tf.assignment()
    treated = set(assign.index[assign["treated"].astype(bool)])
    assert set(places.index) == treated  # every treated place, and nothing else
    assert len(places) == 40  # the demo design treats 40 segments (quickstart.demo_spec)
    # The numbers are the briefing pack's: the plan the pack is drawn from, unit by unit.
    plan = plan_briefing(demo_outputs["trial"])
    pack_number = {
        uid: n for d in plan.districts for uid, n in zip(d.unit_ids, d.numbers, strict=True)
    }
    assert places["number"].to_dict() == pack_number
    assert places["number"].tolist() == list(range(1, 41))  # listed in the pack's order
    # grouped by district: each district's places are consecutive, as in the pack
    districts = places["district"].tolist()
    assert districts == [d.name for d in plan.districts for _ in d.unit_ids]
    units = tf.units()
    assert (places["district"] == units.loc[places.index, "district"]).all()


def test_geo_links_follow_rfc_5870_and_point_at_the_place(places, demo_outputs):
    tf = TrialFile.open(demo_outputs["trial"])
    for uri, lon, lat in zip(places["navigation"], places["lon"], places["lat"], strict=True):
        m = GEO_URI.match(uri)
        assert m, uri
        # RFC 5870: latitude first, in [-90, 90]; longitude second, in [-180, 180]
        assert float(m.group(1)) == pytest.approx(lat, abs=1e-9)
        assert float(m.group(2)) == pytest.approx(lon, abs=1e-9)
        assert -90 <= lat <= 90 and -180 <= lon <= 180
    assert geo_uri(np.array([-29.5]), np.array([-21.25])) == ["geo:-29.50000,-21.25000"]
    # The coordinates are the middle of each segment, projected with pyproj independently.
    geoms = tf.units().geometry.loc[places.index]
    mid = shapely.line_interpolate_point(geoms.values, 0.5, normalized=True)
    to_wgs84 = pyproj.Transformer.from_crs(geoms.crs, "EPSG:4326", always_xy=True)
    lon, lat = to_wgs84.transform(shapely.get_x(mid), shapely.get_y(mid))
    # rounded to 5 decimals: within half a unit of the fifth decimal
    assert np.abs(places["lon"].to_numpy() - lon).max() <= 0.5e-5 + 1e-12
    assert np.abs(places["lat"].to_numpy() - lat).max() <= 0.5e-5 + 1e-12
    # 1e-5 degrees of latitude is about 1.1 m (pyproj's geodesic on WGS 84)
    _, _, metres = pyproj.Geod(ellps="WGS84").inv(0.0, 0.0, 0.0, 1e-5)
    assert 1.0 < metres < 1.2


def test_csv_and_geojson_read_back(places, tmp_path):
    csv, gj = tmp_path / "list.csv", tmp_path / "places.geojson"
    assert save_field_list(places, csv, gj) == [csv, gj]
    table = pd.read_csv(csv)
    assert list(table.columns[:2]) == ["number", "segment_id"]
    assert table["segment_id"].tolist() == list(places.index)
    assert table["navigation"].tolist() == places["navigation"].tolist()
    # GeoJSON read back with geopandas (pyogrio): same places, WGS 84, the same points.
    back = gpd.read_file(gj, engine="pyogrio")
    assert back.crs.equals(pyproj.CRS("EPSG:4326"))
    assert back["segment_id"].tolist() == list(places.index)
    assert back["number"].tolist() == places["number"].tolist()
    assert set(back.geom_type) == {"Point"}
    assert shapely.equals_exact(back.geometry.values, places.geometry.values, tolerance=1e-7).all()
    # RFC 7946: longitude first, no "crs" member, the layer named after the file.
    raw = json.loads(gj.read_text(encoding="utf-8"))
    assert "crs" not in raw and raw["name"] == "places"
    first = raw["features"][0]
    assert first["geometry"]["coordinates"] == pytest.approx(
        [places["lon"].iloc[0], places["lat"].iloc[0]]
    )


def test_command_line_writes_both_files(demo_outputs, tmp_path):
    csv, gj = tmp_path / "f.csv", tmp_path / "f.geojson"
    result = CliRunner().invoke(
        app,
        [
            "field-list",
            str(demo_outputs["trial"]),
            "--out",
            str(csv),
            "--geojson",
            str(gj),
            "-d",
            "Saltvale",
        ],
    )
    assert result.exit_code == 0, result.output
    table = pd.read_csv(csv)
    assert set(table["district"]) == {"Saltvale"}
    plan = plan_briefing(demo_outputs["trial"], districts=["Saltvale"])
    assert table["number"].tolist() == list(plan.districts[0].numbers)
    assert len(gpd.read_file(gj, engine="pyogrio")) == len(table)
    assert "treated places" in result.output
    bad = CliRunner().invoke(app, ["field-list", str(demo_outputs["trial"]), "-d", "Nowhere"])
    assert bad.exit_code != 0


def test_demo_writes_the_field_list_apart_from_the_analysts_list(demo_outputs):
    field = pd.read_csv(demo_outputs["field_list"])
    analyst = pd.read_csv(demo_outputs["analyst_list"])
    assert len(field) == 40
    assert "condition" not in field.columns  # nothing on it names a comparison group
    assert set(field["segment_id"]) < set(analyst["segment_id"])
    assert set(analyst["condition"]) > {"treated"}  # the analysts' list names every condition
    assert len(gpd.read_file(demo_outputs["field_places"], engine="pyogrio")) == 40
    assert demo_outputs["exclusion"].name == "exclusion_zones.geojson"
