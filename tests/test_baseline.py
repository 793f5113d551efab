"""Counts before a trial: incidents onto a units layer, one period or all time, as a new column."""

from __future__ import annotations

import warnings

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import shapely

from geoexp.errors import CRSError, InputError
from geoexp.outcomes import count_onto_units, write_counted_layer
from geoexp.sampleregion import synthetic_grid
from geoexp.units import UnitSet

TOLERANCE = 12.0


def _units(tmp_path) -> UnitSet:
    grid = synthetic_grid(120, spacing=100.0, jitter=5.0, seed=4)
    frame = gpd.GeoDataFrame(
        {"street": grid["unit_id"].to_numpy()},
        geometry=np.asarray(grid.geometry.values, dtype=object),
        crs=None,
    )
    path = tmp_path / "grid.gpkg"
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="'crs' was not provided")
        frame.to_file(path, layer="grid", engine="pyogrio")
    return UnitSet.from_file(path, None, planar="m")


def _incidents(units: UnitSet, n: int = 600, seed: int = 5) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x0, y0, x1, y1 = units.geometry.total_bounds
    days = pd.Timestamp("2024-01-01") + pd.to_timedelta(rng.integers(0, 730, n), unit="D")
    dates = days.strftime("%Y-%m-%d").to_numpy(dtype=object)
    dates[rng.random(n) < 0.05] = ""  # some undated
    return pd.DataFrame(
        {
            "x": rng.uniform(x0, x1, n),
            "y": rng.uniform(y0, y1, n),
            "date": dates,
            "kind": rng.choice(["theft", "burglary", "assault"], n),
        }
    )


def _brute_force(units: UnitSet, xy: np.ndarray) -> np.ndarray:
    """Nearest unit within the tolerance for each point, by every point-unit distance.

    Plain ``shapely.distance`` over all pairs; ties go to the smallest id (the
    documented rule). -1 when no unit is within the tolerance.
    """
    geoms = np.asarray(units.geometry.values, dtype=object)
    d = shapely.distance(shapely.points(xy)[:, None], geoms[None, :])
    order = np.argsort(np.asarray(units.ids), kind="stable")
    d = d[:, order]
    best = np.argmin(d, axis=1)
    near = d[np.arange(len(xy)), best] <= TOLERANCE
    return np.where(near, order[best], -1)


def test_undated_counts_equal_a_brute_force_reference(tmp_path):
    units = _units(tmp_path)
    table = _incidents(units)
    got = count_onto_units(
        units,
        table,
        column="y0",
        tolerance_m=TOLERANCE,
        x="x",
        y="y",
        crs="planar",
        max_dropped_share=1.0,
    )
    nearest = _brute_force(units, table[["x", "y"]].to_numpy())
    expected = np.bincount(nearest[nearest >= 0], minlength=units.n)
    np.testing.assert_array_equal(got.counts.to_numpy(), expected)
    assert got.counts.index.equals(units.ids)
    # without a period no date is read: undated incidents count too
    assert got.drops.missing_date == 0
    assert got.drops.n_counted == int((nearest >= 0).sum())
    assert got.drops.outside_tolerance == int((nearest < 0).sum())


def test_period_and_type_filter(tmp_path):
    units = _units(tmp_path)
    table = _incidents(units)
    got = count_onto_units(
        units,
        table,
        column="thefts_2024",
        tolerance_m=TOLERANCE,
        x="x",
        y="y",
        crs="planar",
        date_column="date",
        period=("2024-01-01", "2024-12-31"),
        type_column="kind",
        types=["theft"],
        max_dropped_share=1.0,
    )
    dated = pd.to_datetime(table["date"], errors="coerce")
    keep = (
        (dated >= "2024-01-01") & (dated <= "2024-12-31") & (table["kind"] == "theft")
    ).to_numpy()
    nearest = _brute_force(units, table[["x", "y"]].to_numpy())
    hit = nearest[keep & (nearest >= 0)]
    np.testing.assert_array_equal(got.counts.to_numpy(), np.bincount(hit, minlength=units.n))
    assert got.other_types == int((table["kind"] != "theft").sum())
    assert got.drops.missing_date == int(((table["date"] == "") & (table["kind"] == "theft")).sum())
    assert "dated 2024-01-01 to 2024-12-31" in str(got)


def test_written_layer_keeps_features_and_adds_the_column(tmp_path):
    units = _units(tmp_path)
    table = _incidents(units)
    got = count_onto_units(
        units,
        table,
        column="y0",
        tolerance_m=TOLERANCE,
        x="x",
        y="y",
        crs="planar",
        max_dropped_share=1.0,
    )
    out = write_counted_layer(units, got, tmp_path / "counted.gpkg", source_layer="grid")
    back = gpd.read_file(out)
    original = gpd.read_file(units.source)
    assert back.crs is None  # the layer had none and gets none
    pd.testing.assert_frame_equal(
        pd.DataFrame(back.drop(columns=["geometry", "y0"])),
        pd.DataFrame(original.drop(columns="geometry")),
    )
    assert shapely.equals(back.geometry.values, original.geometry.values).all()
    np.testing.assert_array_equal(back["y0"].to_numpy(), got.counts.to_numpy())
    again = UnitSet.from_file(out, None, planar="m")
    assert again.ids.equals(units.ids)
    csv = write_counted_layer(units, got, tmp_path / "counted.csv")
    frame = pd.read_csv(csv)
    assert list(frame.columns) == ["row", "y0"]
    np.testing.assert_array_equal(frame["y0"].to_numpy(), got.counts.to_numpy())


def test_mistakes_refused(tmp_path):
    units = _units(tmp_path)
    table = _incidents(units)
    args = {"tolerance_m": TOLERANCE, "x": "x", "y": "y", "crs": "planar"}
    near = table.assign(x=table["x"].round(-2))  # on the vertical streets: all within reach
    taken = str(units.frame.columns[0])
    with pytest.raises(InputError, match="already has a column"):
        count_onto_units(units, table, column=taken, **args)
    with pytest.raises(InputError, match="'arson'"):
        count_onto_units(units, near, column="n", type_column="kind", types=["arson"], **args)
    with pytest.raises(InputError, match="date_column"):
        count_onto_units(units, near, column="n", period=("2024-01-01", "2024-12-31"), **args)
    utm = UnitSet.from_frame(units.frame.set_crs(None, allow_override=True), None, crs=32633)
    with pytest.raises(CRSError, match="planar"):
        count_onto_units(utm, near, column="n", **args)
    far = table.assign(x=table["x"] + 1e6)
    with pytest.raises(InputError, match="could not be counted"):
        count_onto_units(units, far, column="n", **args)
