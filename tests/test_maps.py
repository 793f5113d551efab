"""Tests of geoexp.maps without a browser: palette, page content, exclusion-zone round trip, CLI.

The browser checks (the page really draws, offline) are in test_browser.py.
"""

from __future__ import annotations

import itertools
import json
import re
import tomllib
import warnings

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import pytest
import shapely
import tomli_w

from geoexp.errors import CRSError, InputError
from geoexp.maps import (
    OKABE_ITO,
    ZONES_FILENAME,
    OfflineAssetWarning,
    _assets,
    condition_order,
    condition_style,
    drawing_map,
    map_html,
    offline_assets_available,
    planning_map,
    save_map,
)

# ----------------------------------------------------------------------------- fixtures


@pytest.fixture(scope="module")
def page(trial):
    html, remote = map_html(planning_map(trial))
    return html, remote


def _config(html: str) -> dict:
    return json.loads(re.search(r"var cfg = (\{.*?\});\n", html).group(1))


def _datasets(html: str) -> dict:
    return json.loads(re.search(r"var datasets = (\{.*?\});\n", html).group(1))


def _decode_units(compact: dict) -> tuple[list[str], np.ndarray]:
    """Rebuild unit lines in lon/lat from the page's compact encoding, as the page script does."""
    ox, oy = compact["origin"]
    scale = compact["scale"]
    lines = [
        shapely.LineString((np.asarray(c, dtype=float) + [ox, oy]) * scale) for c in compact["g"]
    ]
    return compact["id"], np.array(lines, dtype=object)


# ------------------------------------------------------------------------------ palette


def test_okabe_ito_values():
    # Okabe & Ito (2008), Color Universal Design, RGB values of the eight colours (from memory).
    assert OKABE_ITO == {
        "black": "#000000",
        "orange": "#E69F00",
        "sky_blue": "#56B4E9",
        "bluish_green": "#009E73",
        "yellow": "#F0E442",
        "blue": "#0072B2",
        "vermillion": "#D55E00",
        "reddish_purple": "#CC79A7",
    }


@pytest.mark.parametrize("n_bands", [1, 2, 3, 5, 8])
def test_conditions_differ_in_grey(n_bands):
    codes = ["treated", *[f"spillover_{k}" for k in range(1, n_bands + 1)], "pure_control"]
    styles = [condition_style(c) for c in codes]
    # In black and white only width and dash remain: every pair must differ in one of them.
    for a, b in itertools.combinations(styles, 2):
        assert (a.width, a.dash) != (b.width, b.dash), (a.code, b.code)
    # Treated is the heaviest line and spillover bands thin out with distance.
    widths = [s.width for s in styles[:-1]]
    assert widths == sorted(widths, reverse=True)
    assert all(s.colour in OKABE_ITO.values() for s in styles)


def test_styles_are_valid_for_matplotlib_and_svg():
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots()
    for code in ["treated", "spillover_1", "spillover_2", "spillover_3", "pure_control"]:
        s = condition_style(code)
        # matplotlib itself validates the colour and the dash pattern.
        (line,) = ax.plot([0, 1], [0, 1], color=s.colour, lw=s.width, linestyle=s.mpl_linestyle)
        assert line.get_linewidth() == s.width
        if s.dash:
            assert re.fullmatch(r"[0-9.]+( [0-9.]+)+", s.dash_array)
        else:
            assert s.dash_array is None and s.mpl_linestyle == "solid"
    plt.close(fig)


@pytest.mark.parametrize("bad", ["control", "spillover_0", "spillover_x", "", None])
def test_unknown_condition_code_raises(bad):
    with pytest.raises(InputError, match="condition code"):
        condition_style(bad)


def test_condition_order():
    codes = ["pure_control", "spillover_10", "treated", "spillover_2", "spillover_1"]
    assert condition_order(codes) == [
        "treated",
        "spillover_1",
        "spillover_2",
        "spillover_10",
        "pure_control",
    ]


# ------------------------------------------------------------------------- page content


def test_page_is_self_contained(page):
    html, remote = page
    assert offline_assets_available()
    assert remote == []
    # No script or stylesheet is loaded from anywhere: everything is inline.
    assert not re.search(r"<script[^>]+src=", html)
    assert not re.search(r"<link[^>]+stylesheet", html)
    assert "Leaflet 1." in html and "Leaflet.draw 1." in html
    for unused in ("jquery", "bootstrap.bundle", "fontawesome", "awesome-markers"):
        assert unused not in html.lower()
    # Stylesheet images are data URIs, not relative files that would be missing.
    assert not re.search(r"url\(['\"]?images/", html)
    assert "data:image/png;base64," in html


def test_layer_counts_match_trial(page, trial):
    html, _ = page
    cfg = _config(html)
    expected = {lay["key"]: lay["expected"] for lay in cfg["layers"]}
    assignment = trial.assignment()
    # Reference: counts straight from the trial file with pandas.
    counts = assignment["condition"].value_counts()
    for code, n in counts.items():
        assert expected[f"condition:{code}"] == n
    assert expected["eligible"] == int(assignment["eligible"].sum())
    probability_layers = [k for k in expected if k.startswith("probability:")]
    assert len(probability_layers) == sum(c.startswith("p_") for c in assignment.columns)
    assert all(expected[k] == len(assignment) for k in probability_layers)
    assert expected["districts"] == 8  # the sample city's eight districts
    bands = trial.spec().exposure.bands_m
    assert [k for k in expected if k.startswith("ring:")] == [
        f"ring:{k + 1}" for k in range(len(bands))
    ]


def test_draw_tool_offers_polygon_and_rectangle_only(page):
    html, _ = page
    options = json.loads(re.search(r"draw: (\{.*?\}\}),\n", html).group(1))
    enabled = {name for name, value in options.items() if value is not False}
    assert enabled == {"polygon", "rectangle"}


def test_embedded_geometry_is_close_and_rounded(page, trial):
    html, _ = page
    ids, lines = _decode_units(_datasets(html)["units"]["compact"])
    units = trial.units()
    assert ids == units.index.astype(str).tolist()
    # Back in the units' CRS (pyproj), every embedded line lies within 1 m of the original
    # (0.5 m simplification + 0.1 m rounding; Hausdorff distance from shapely).
    back = gpd.GeoSeries(lines, crs="EPSG:4326").to_crs(units.crs)
    dist = shapely.hausdorff_distance(
        np.asarray(back.array, dtype=object), np.asarray(units.geometry.array, dtype=object)
    )
    assert float(dist.max()) < 1.0
    coords = shapely.get_coordinates(lines)
    assert np.allclose(coords, np.round(coords, 6), atol=1e-9)


def test_probabilities_and_tooltip_fields_embedded(page, trial):
    html, _ = page
    compact = _datasets(html)["units"]["compact"]
    assignment = trial.assignment()
    codes = condition_order(c[2:] for c in assignment.columns if c.startswith("p_"))
    p = np.asarray(compact["p"], dtype=float) / 1000.0
    ref = assignment[[f"p_{c}" for c in codes]].to_numpy(dtype=float)
    assert np.abs(p - ref).max() <= 0.0005 + 1e-12  # rounded to thousandths
    units = trial.units()
    assert compact["d"] == units["description"].tolist()
    assert [compact["dsn"][i] for i in compact["ds"]] == units["district"].tolist()
    assert [compact["cn"][i] for i in compact["c"]] == assignment["condition"].tolist()


def test_legend_and_caution_in_page(page, trial):
    from geoexp.cautions import CAUTION

    html, _ = page
    legend = json.loads(re.search(r"div.innerHTML = (\".*?\");\n", html).group(1))
    for label in trial.assignment()["condition_label"].unique():
        assert label in legend
    assert CAUTION.split(".")[0].replace(",", "") in legend.replace(",", "")
    assert trial.spec_hash[:12] in legend


def test_sample_city_page_size(page):
    html, _ = page
    size = len(html.encode("utf-8"))
    # 3,542 segments in four condition layers, four probability layers, rings and districts,
    # with Leaflet and Leaflet.draw inlined: well under a megabyte.
    assert size < 900_000, size


def test_sample_city_has_no_tiles_real_city_has(trial):
    html, _ = map_html(planning_map(trial, tiles=None))
    assert "tile.openstreetmap.org" not in html
    html, _ = map_html(planning_map(trial, tiles="OpenStreetMap"))
    assert "tile.openstreetmap.org" in html


def test_save_map_atomic_and_fallback(trial, tmp_path, monkeypatch):
    m = planning_map(trial)
    out = save_map(m, tmp_path / "sub" / "plan.html")
    assert out.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")
    assert [p.name for p in out.parent.iterdir()] == ["plan.html"]  # no temporary left behind

    # Without the shipped copies of Leaflet: a clear warning and content-network links.
    monkeypatch.setattr(_assets, "_find_bundle", lambda: None)
    with pytest.warns(OfflineAssetWarning, match="shipped with geoexp"):
        save_map(planning_map(trial), tmp_path / "online.html")
    html = (tmp_path / "online.html").read_text(encoding="utf-8")
    assert re.search(r"<script src=\"https://[^\"]+/leaflet.js\"", html)
    assert re.search(r"<script src=\"https://[^\"]+/leaflet.draw.js\"", html)
    assert "jquery" not in html.lower()


def test_planning_map_refuses_missing_file(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        planning_map(tmp_path / "nope.gpkg")


# ------------------------------------------------------------------------ drawing map


def test_drawing_map_counts_and_no_mutation(region):
    segments = region.segments.set_index("segment_id")
    before = segments.copy()
    eligible = segments.index[segments["incidents_y1"] >= segments["incidents_y1"].quantile(0.9)]
    html, remote = map_html(drawing_map(segments, eligible=eligible))
    assert remote == []
    expected = {lay["key"]: lay["expected"] for lay in _config(html)["layers"]}
    assert expected["units"] == len(segments)
    assert expected["eligible"] == len(eligible)
    pd.testing.assert_frame_equal(segments, before)


def test_drawing_map_refuses_geographic_crs(region):
    lonlat = region.segments.set_index("segment_id").to_crs("EPSG:4326")
    with pytest.raises(CRSError, match="projected"):
        drawing_map(lonlat)


def test_drawing_map_bad_mask(region):
    segments = region.segments.set_index("segment_id")
    with pytest.raises(InputError, match="entries"):
        drawing_map(segments, eligible=np.ones(3, dtype=bool))
    with pytest.raises(InputError, match="not among the units"):
        drawing_map(segments, eligible=pd.Index(["no-such-unit"]))


# ------------------------------------------------------------ exclusion-zone round trip


def leaflet_draw_geojson(rings_lonlat: list[list[tuple[float, float]]]) -> dict:
    """A FeatureCollection written the way the map's 'Save zones' button writes it.

    Leaflet's Polygon.toGeoJSON gives [lng, lat] pairs rounded to 6 decimals with the
    ring closed (first point repeated); Leaflet.draw rectangles are polygons too; the
    page adds the properties {zone, drawn_on}; no "crs" member (RFC 7946: lon/lat WGS84).
    """
    features = []
    for k, ring in enumerate(rings_lonlat):
        coords = [[round(x, 6), round(y, 6)] for x, y in ring]
        if coords[0] != coords[-1]:
            coords.append(coords[0])
        features.append(
            {
                "type": "Feature",
                "properties": {"zone": k + 1, "drawn_on": "2026-01-01"},
                "geometry": {"type": "Polygon", "coordinates": [coords]},
            }
        )
    return {"type": "FeatureCollection", "features": features}


def _zones_around_some_units(units: gpd.GeoDataFrame) -> list[list[tuple[float, float]]]:
    """A rectangle and a triangle in lon/lat over parts of the city."""
    to_lonlat = pyproj.Transformer.from_crs(units.crs, "EPSG:4326", always_xy=True)
    x0, y0, x1, y1 = units.total_bounds
    w, h = x1 - x0, y1 - y0
    rect = [
        (x0 + 0.20 * w, y0 + 0.20 * h),
        (x0 + 0.20 * w, y0 + 0.32 * h),
        (x0 + 0.35 * w, y0 + 0.32 * h),
        (x0 + 0.35 * w, y0 + 0.20 * h),
    ]
    tri = [
        (x0 + 0.6 * w, y0 + 0.6 * h),
        (x0 + 0.8 * w, y0 + 0.62 * h),
        (x0 + 0.7 * w, y0 + 0.8 * h),
    ]
    return [[to_lonlat.transform(x, y) for x, y in ring] for ring in (rect, tri)]


def _units_touching(units: gpd.GeoDataFrame, fc: dict) -> pd.Index:
    """Reference: units intersecting the zones, with pyproj and shapely directly."""
    to_units = pyproj.Transformer.from_crs("EPSG:4326", units.crs, always_xy=True)
    polys = [
        shapely.Polygon([to_units.transform(x, y) for x, y in f["geometry"]["coordinates"][0]])
        for f in fc["features"]
    ]
    hit = shapely.intersects(
        np.asarray(units.geometry.array, dtype=object)[:, None], np.array(polys)[None, :]
    ).any(axis=1)
    return units.index[hit]


def test_drawn_zones_round_trip_through_unitset(region_path, tmp_path):
    from geoexp.units import UnitSet

    units = UnitSet.from_file(region_path, "segment_id", layer="segments")
    fc = leaflet_draw_geojson(_zones_around_some_units(units.frame))
    path = tmp_path / "exclusion_zones.geojson"
    path.write_text(json.dumps(fc), encoding="utf-8")
    kept = units.exclude(path)
    dropped = units.ids.difference(kept.ids)
    expected = _units_touching(units.frame, fc)
    assert len(expected) > 20  # the zones do cover streets, so the test can fail
    assert set(dropped) == set(expected)


def test_drawn_zones_round_trip_through_design_spec(demo, tmp_path):
    """The design spec's [eligible] exclude takes the exported file back."""
    from geoexp.design import Design, DesignSpec
    from geoexp.units import UnitSet

    spec_data = tomllib.loads((demo / "design.toml").read_text(encoding="utf-8"))
    units = UnitSet.from_file(
        spec_data["units"]["path"], spec_data["units"]["id_column"], layer="segments"
    )
    fc = leaflet_draw_geojson(_zones_around_some_units(units.frame))
    (tmp_path / "exclusion_zones.geojson").write_text(json.dumps(fc), encoding="utf-8")
    spec_data["eligible"] = {"exclude": ["exclusion_zones.geojson"], "exclude_how": "intersects"}
    spec_path = tmp_path / "design.toml"
    spec_path.write_text(tomli_w.dumps(spec_data), encoding="utf-8")
    design = Design.from_spec(DesignSpec.from_toml(spec_path))
    excluded = design.units.ids.difference(design.eligible_ids)
    assert set(excluded) == set(_units_touching(units.frame, fc))


def test_planning_map_shows_the_zones_in_force_with_reasons(page, trial, demo):
    """The design's own zone file, read back with geopandas, is on the planning map."""
    html, _ = page
    spec = trial.spec()
    zone_files = [spec.resolve(z) for z in spec.eligible.exclude]
    assert [p.name for p in zone_files] == ["exclusion_zones.geojson"]  # the saved name
    zones = gpd.read_file(zone_files[0], engine="pyogrio")
    shown = _datasets(html)["zones_1"]["data"]["features"]
    assert len(shown) == len(zones) == 1
    assert shown[0]["properties"]["reason"] == zones["reason"].iloc[0]
    # the zone drawn is the file's polygon (same area in the units' CRS, shapely)
    drawn = gpd.GeoSeries([shapely.geometry.shape(shown[0]["geometry"])], crs="EPSG:4326").to_crs(
        trial.units().crs
    )
    assert drawn.area.iloc[0] == pytest.approx(zones.to_crs(drawn.crs).area.iloc[0], rel=1e-3)
    assert zones["reason"].iloc[0] in html  # in the legend as well


def test_zone_without_reason_or_file_is_said_so(region, tmp_path):
    segments = region.segments.set_index("segment_id")
    box = shapely.box(*segments.total_bounds).centroid.buffer(200.0)
    no_reason = gpd.GeoDataFrame({"zone": [1]}, geometry=[box], crs=segments.crs).to_crs(4326)
    path = tmp_path / "exclusion_zones.geojson"
    no_reason.to_file(path, engine="pyogrio")
    html, _ = map_html(drawing_map(segments, zones=[path, tmp_path / "gone.geojson"], tiles=None))
    assert "no reason recorded" in html
    assert "gone.geojson not found" in html
    assert _config(html)["zones_filename"] == "exclusion_zones.geojson" == ZONES_FILENAME


# --------------------------------------------------------------------------------- CLI


def test_map_command(demo, tmp_path):
    from typer.testing import CliRunner

    import geoexp.cli._map_commands  # noqa: F401 - registers the command
    from geoexp.cli._app import app

    runner = CliRunner()
    out = tmp_path / "plan.html"
    with warnings.catch_warnings():
        warnings.simplefilter("error", OfflineAssetWarning)
        result = runner.invoke(app, ["map", str(demo / "trial.gpkg"), "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert out.exists() and "Map written" in result.output
    assert "condition:treated" in out.read_text(encoding="utf-8")

    draw = tmp_path / "draw.html"
    result = runner.invoke(
        app, ["map", str(demo / "design.toml"), "--draw-only", "--out", str(draw)]
    )
    assert result.exit_code == 0, result.output
    cfg = _config(draw.read_text(encoding="utf-8"))
    expected = {lay["key"]: lay["expected"] for lay in cfg["layers"]}
    # The demo spec keeps its top 150 hot spots after the exclusion zone.
    spec = tomllib.loads((demo / "design.toml").read_text(encoding="utf-8"))
    assert expected["eligible"] == spec["eligible"]["top_k"]
    assert expected["zones:1"] == 1  # the demo's stadium zone is shown for reference
    assert not any(k.startswith("condition:") for k in expected)


def test_real_city_gets_tiles_and_district_outlines(region):
    # The same streets labelled as lying elsewhere (UTM 33N): no longer the sample city.
    segments = region.segments.set_index("segment_id").set_crs("EPSG:32633", allow_override=True)
    html, _ = map_html(drawing_map(segments))
    assert "tile.openstreetmap.org" in html
    expected = {lay["key"]: lay["expected"] for lay in _config(html)["layers"]}
    assert expected["districts"] == segments["district"].nunique()
    assert "outlines drawn around their units" in html


def test_explicit_districts(region, trial):
    districts = region.districts.iloc[:3]
    html, _ = map_html(planning_map(trial, districts=districts))
    expected = {lay["key"]: lay["expected"] for lay in _config(html)["layers"]}
    assert expected["districts"] == 3
    with pytest.raises(InputError, match="polygons"):
        planning_map(trial, districts=region.segments.head())


def test_vendored_leaflet_versions_and_licences():
    from importlib.resources import files

    from geoexp.maps._assets import LEAFLET_DRAW_VERSION, LEAFLET_VERSION

    vendor = files("geoexp.maps").joinpath("assets", "vendor")
    js = vendor.joinpath("leaflet", "leaflet.js").read_text(encoding="utf-8")[:300]
    draw = vendor.joinpath("leaflet-draw", "leaflet.draw.js").read_text(encoding="utf-8")[:300]
    # The released files' own headers name their versions and keep their copyright lines.
    assert f"Leaflet {LEAFLET_VERSION}" in js and "Agafonkin" in js
    assert f"Leaflet.draw {LEAFLET_DRAW_VERSION}" in draw and "Jacob Toye" in draw
    # Leaflet is BSD 2-Clause, Leaflet.draw MIT: both need their notices shipped beside the copy.
    assert "BSD 2-Clause" in vendor.joinpath("leaflet", "LICENSE").read_text(encoding="utf-8")
    assert "Permission is hereby granted" in vendor.joinpath("leaflet-draw", "LICENSE").read_text(
        encoding="utf-8"
    )
    readme = vendor.joinpath("README.md").read_text(encoding="utf-8")
    assert LEAFLET_VERSION in readme and LEAFLET_DRAW_VERSION in readme


def test_no_script_or_style_in_python_sources():
    from pathlib import Path

    import geoexp.maps

    # Page scripts and styles live in assets/*.js and *.css, not in Python strings.
    for source in Path(geoexp.maps.__file__).parent.glob("*.py"):
        text = source.read_text(encoding="utf-8")
        # (_assets.py wraps the files it inlines in <script>/<style> tags: markup, not code.)
        for marker in ("function (", "L.geoJSON", "{% macro", "var map", "border-radius", "font:"):
            assert marker not in text, f"{source.name} holds page code ({marker!r})"
