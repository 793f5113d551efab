"""Tests of layers in local planar coordinates (no CRS, or a local engineering CRS)."""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import pytest

from geoexp.errors import CRSError
from geoexp.graph import ExposureGraph
from geoexp.outcomes import count_incidents
from geoexp.sampleregion import synthetic_grid
from geoexp.units import UnitSet, describe_crs, planar_crs, require_geographic_reference

# A spot inside UTM zone 33N, so the same coordinates are plausible there.
X0, Y0 = 500_000.0, 5_000_000.0
FT = 0.3048  # the international foot, exactly (1959 agreement; pyproj's factor for EPSG:2222)
FT_US = 1200 / 3937  # the US survey foot (pyproj's factor for EPSG:2263)


def _grid(scale: float = 1.0) -> gpd.GeoDataFrame:
    """A street grid at (X0, Y0) in metres, divided by ``scale`` (metres per coordinate unit)."""
    grid = synthetic_grid(400, spacing=100.0, jitter=6.0, seed=3)
    moved = grid.geometry.translate(X0, Y0).scale(1 / scale, 1 / scale, origin=(0, 0))
    geoms = np.asarray(moved.values, dtype=object)
    return gpd.GeoDataFrame(grid.drop(columns="geometry"), geometry=geoms, crs=None)


def _pairs(graph: ExposureGraph) -> pd.DataFrame:
    return graph.pairs().sort_values(["unit_a", "unit_b"]).reset_index(drop=True)


def _texts(units: UnitSet, graph: ExposureGraph) -> list[str]:
    return [units.crs_report, *units.notes, repr(units), describe_crs(units.crs), str(graph.crs)]


@pytest.mark.parametrize("metric", ["euclidean", "network"])
def test_planar_metres_equal_a_metric_crs(metric):
    planar = UnitSet.from_frame(_grid(), "unit_id", planar="m")
    utm = UnitSet.from_frame(_grid(), "unit_id", crs="EPSG:32633")
    a = ExposureGraph.from_units(planar, 250.0, metric=metric)
    b = ExposureGraph.from_units(utm, 250.0, metric=metric)
    assert a.n_pairs > 0
    # The same coordinates in a CRS whose unit is the metre (pyproj: EPSG:32633
    # is in metres) give the same pairs and distances.
    pd.testing.assert_frame_equal(_pairs(a), _pairs(b))
    assert planar.metres_per_unit == utm.metres_per_unit == 1.0
    assert planar.is_planar and not utm.is_planar


@pytest.mark.parametrize(("unit", "code", "factor"), [("ft", 2222, FT), ("us-ft", 2263, FT_US)])
def test_planar_feet_equal_a_foot_crs(unit, code, factor):
    # pyproj: EPSG:2222 is in international feet, EPSG:2263 in US survey feet.
    assert pyproj.CRS(code).axis_info[0].unit_conversion_factor == pytest.approx(factor, rel=1e-15)
    planar = UnitSet.from_frame(_grid(factor), "unit_id", planar=unit)
    feet = UnitSet.from_frame(_grid(factor), "unit_id", crs=code)
    metres = UnitSet.from_frame(_grid(), "unit_id", planar="m")
    a = ExposureGraph.from_units(planar, 250.0)
    b = ExposureGraph.from_units(feet, 250.0)
    pd.testing.assert_frame_equal(_pairs(a), _pairs(b))
    assert planar.metres_per_unit == pytest.approx(factor, rel=1e-15)
    # Distances are in metres: the same as the layer drawn in metres, up to rounding.
    c = _pairs(ExposureGraph.from_units(metres, 250.0))
    got = _pairs(a)
    shared = got.merge(c, on=["unit_a", "unit_b"])
    assert len(shared) >= 0.99 * min(len(got), len(c))
    np.testing.assert_allclose(shared["distance_m_x"], shared["distance_m_y"], atol=1e-6)


def test_planar_outputs_never_name_a_crs(tmp_path):
    path = tmp_path / "grid.gpkg"
    _grid().to_file(path, layer="streets")
    units = UnitSet.from_file(path, "unit_id", planar="m")
    graph = ExposureGraph.from_units(units, 200.0, metric="network")
    texts = _texts(units, graph)
    assert "local planar coordinates in metres (no CRS)" in units.crs_report
    for text in texts:
        assert "EPSG" not in text and "UTM" not in text, text
    # Written out (as a trial file does) and read back, it is still planar and
    # still says so.
    back = tmp_path / "back.gpkg"
    units.frame.reset_index().to_file(back, layer="units")
    again = UnitSet.from_file(back, "unit_id")
    assert again.is_planar and again.metres_per_unit == 1.0
    assert again.crs.name == "local planar coordinates in metres (no CRS)"
    for text in _texts(again, ExposureGraph.from_units(again, 200.0)):
        assert "EPSG" not in text and "UTM" not in text, text


def test_engineering_crs_kept_with_its_own_name():
    site = pyproj.CRS.from_wkt(
        'ENGCRS["Harbour site grid",EDATUM["Harbour datum"],CS[Cartesian,2],'
        'AXIS["x",east,ORDER[1],LENGTHUNIT["foot",0.3048]],'
        'AXIS["y",north,ORDER[2],LENGTHUNIT["foot",0.3048]]]'
    )
    frame = _grid(FT).set_crs(site)
    units = UnitSet.from_frame(frame, "unit_id")
    assert "Harbour site grid" in units.crs_report and "EPSG" not in units.crs_report
    assert units.metres_per_unit == FT and units.is_planar
    # planar= agreeing with the CRS's unit is accepted; disagreeing is refused.
    assert UnitSet.from_frame(frame, "unit_id", planar="ft").metres_per_unit == FT
    with pytest.raises(CRSError, match="planar= says metres"):
        UnitSet.from_frame(frame, "unit_id", planar="m")


def test_planar_misuse_refused():
    with pytest.raises(CRSError, match="planar='m'"):
        UnitSet.from_frame(_grid(), "unit_id")
    with pytest.raises(CRSError, match="not both"):
        UnitSet.from_frame(_grid(), "unit_id", crs="EPSG:32633", planar="m")
    with pytest.raises(CRSError, match="planar= is for a layer with no CRS"):
        UnitSet.from_frame(_grid().set_crs("EPSG:32633"), "unit_id", planar="m")
    with pytest.raises(CRSError, match="planar= must be one of"):
        UnitSet.from_frame(_grid(), "unit_id", planar="yards")


def test_lon_lat_refused_for_planar_layer():
    units = UnitSet.from_frame(_grid(), "unit_id", planar="m")
    with pytest.raises(CRSError, match="no geographic reference"):
        require_geographic_reference(units, "a web map")
    require_geographic_reference(UnitSet.from_frame(_grid(), "unit_id", crs=32633), "a web map")
    mid = units.geometry.iloc[0].interpolate(0.5, normalized=True)
    kw = dict(date_column="date", tolerance_m=10.0, pre=("2024-01-01", "2024-12-31"))
    kw["post"] = ("2025-01-01", "2025-12-31")
    lonlat = pd.DataFrame({"lon": [15.0], "lat": [45.0], "date": ["2024-05-01"]})
    with pytest.raises(CRSError, match="incidents in WGS 84.*no geographic reference"):
        count_incidents(units, lonlat, lon="lon", lat="lat", **kw)
    in_utm = pd.DataFrame({"x": [mid.x], "y": [mid.y], "date": ["2024-05-01"]})
    with pytest.raises(CRSError, match="no geographic reference"):
        count_incidents(units, in_utm, x="x", y="y", crs=32633, **kw)
    # Incidents in the same local coordinates are counted: the point is on unit 0.
    # one incident in each period, so that the counting stop for an empty period does not apply
    both = pd.DataFrame(
        {"x": [mid.x, mid.x], "y": [mid.y, mid.y], "date": ["2024-05-01", "2025-05-01"]}
    )
    same = count_incidents(units, both, x="x", y="y", crs=planar_crs("m"), **kw)
    assert same.to_frame()["pre"].sum() == 1
    assert same.to_frame()["pre"].iloc[0] == 1
