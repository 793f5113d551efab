"""Tests of geoexp.outcomes: reading incidents, snapping, counting, drop reports, storage."""

from __future__ import annotations

import datetime as dt
from functools import partial

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pyproj
import pytest
import shapely
from hypothesis import HealthCheck, assume, example, given, settings
from hypothesis import strategies as st

from geoexp.errors import CRSError, GeometryError, InputError
from geoexp.outcomes import (
    REASONS,
    ObservedIncidents,
    OutcomeTable,
    load_outcomes,
    save_outcomes,
)
from geoexp.outcomes import count_incidents as count_checked
from geoexp.trialfile import TrialFile
from geoexp.units import UnitSet

# These tests check the counting itself on toy inputs that drop most incidents or leave a
# period empty on purpose; the stop on such inputs is tested on its own (count_checked).
count_incidents = partial(count_checked, max_dropped_share=None)

YEAR_2024 = ("2024-01-01", "2024-12-31")
YEAR_2025 = ("2025-01-01", "2025-12-31")
# Somewhere in the empty ocean of UTM zone 27S, like the sample city.
X0, Y0 = 420_000.0, 7_350_000.0


@pytest.fixture(scope="module")
def units(region):
    return UnitSet.from_frame(region.segments, "segment_id")


@pytest.fixture(scope="module")
def city_counts(units, region):
    return count_incidents(
        units,
        region.incidents,
        date_column="date",
        type_column="incident_type",
        by_type=True,
        tolerance_m=30.0,
        pre=YEAR_2024,
        post=YEAR_2025,
    )


def _sjoin_counts(units, incidents, start, end, tolerance, type_value=None):
    """Independent count: geopandas sjoin_nearest with max_distance, one period."""
    dates = incidents["date"]
    sel = (dates >= pd.Timestamp(start)) & (dates <= pd.Timestamp(end))
    if type_value is not None:
        sel &= incidents["incident_type"] == type_value
    right = units.frame[["geometry"]].reset_index()
    joined = gpd.sjoin_nearest(incidents[sel][["geometry"]], right, max_distance=tolerance)
    assert not joined.index.duplicated().any()  # the sample city has no equidistant incidents
    return joined[units.id_column].value_counts().reindex(units.ids, fill_value=0)


def _line_units(ids=(1,), crs="EPSG:32727", ys=(0.0,)):
    """Horizontal 100 m segments at heights ``ys`` (metres above Y0)."""
    lines = [shapely.LineString([(X0, Y0 + yy), (X0 + 100, Y0 + yy)]) for yy in ys]
    frame = gpd.GeoDataFrame({"uid": list(ids)}, geometry=lines, crs="EPSG:32727").to_crs(crs)
    return UnitSet.from_frame(frame, "uid")


# ----------------------------------------------------------- agreement with others


def test_sample_city_counts_equal_its_own_columns(city_counts, region):
    # Source: the sample city's incidents_y1/incidents_y2, computed by the city
    # generator with shapely STRtree.query_nearest within 30 m (sampleregion/_city.py).
    seg = region.segments.set_index("segment_id")
    np.testing.assert_array_equal(
        city_counts.counts["pre"], seg["incidents_y1"].reindex(city_counts.ids)
    )
    np.testing.assert_array_equal(
        city_counts.counts["post"], seg["incidents_y2"].reindex(city_counts.ids)
    )
    assert city_counts.counts["pre"].sum() > 5000  # the check has teeth: thousands counted


def test_counts_agree_with_geopandas_sjoin_nearest(city_counts, units, region):
    # Source: geopandas sjoin_nearest(max_distance=30), per period and per type.
    for column, (start, end) in (("pre", YEAR_2024), ("post", YEAR_2025)):
        expected = _sjoin_counts(units, region.incidents, start, end, 30.0)
        np.testing.assert_array_equal(city_counts.counts[column], expected)
    for label, (pre_col, post_col) in city_counts.type_columns.items():
        expected = _sjoin_counts(units, region.incidents, *YEAR_2025, 30.0, type_value=label)
        np.testing.assert_array_equal(city_counts.counts[post_col], expected)
        assert city_counts.counts[pre_col].sum() > 0
    # Source: arithmetic: the types partition the incidents.
    pre_types = [c for c, _ in city_counts.type_columns.values()]
    np.testing.assert_array_equal(
        city_counts.counts[pre_types].sum(axis=1), city_counts.counts["pre"]
    )


def test_small_tolerance_agrees_with_sjoin_nearest(units, region):
    # Source: geopandas sjoin_nearest(max_distance=5); a tolerance where many are dropped.
    table = count_incidents(
        units, region.incidents, date_column="date", tolerance_m=5.0, pre=YEAR_2024, post=YEAR_2025
    )
    expected = _sjoin_counts(units, region.incidents, *YEAR_2024, 5.0)
    np.testing.assert_array_equal(table.counts["pre"], expected)
    assert table.drops.outside_tolerance > 1000


def test_lon_lat_csv_round_trip(tmp_path, units, region, city_counts):
    # Source: pyproj Transformer EPSG:32727 -> EPSG:4326 for the CSV coordinates;
    # the counts must equal those from the projected points.
    to_lonlat = pyproj.Transformer.from_crs(32727, 4326, always_xy=True)
    inc = region.incidents
    lon, lat = to_lonlat.transform(inc.geometry.x.to_numpy(), inc.geometry.y.to_numpy())
    csv = tmp_path / "incidents.csv"
    pd.DataFrame(
        {
            "id": inc["incident_id"],
            "longitude": lon,
            "latitude": lat,
            "when": inc["date"].dt.strftime("%Y-%m-%d"),
        }
    ).to_csv(csv, index=False, float_format="%.12f")
    table = count_incidents(
        units, csv, date_column="when", lon="longitude", lat="latitude",
        tolerance_m=30.0, pre=YEAR_2024, post=YEAR_2025,
    )  # fmt: skip
    pd.testing.assert_frame_equal(table.counts, city_counts.counts[["pre", "post"]])
    assert table.drops.counts() == city_counts.drops.counts()


def test_day_first_dates_with_date_format(tmp_path, units, region, city_counts):
    # Source: the same incidents with dates written day first (strftime %d/%m/%Y).
    inc = region.incidents
    csv = tmp_path / "incidents_dmy.csv"
    pd.DataFrame(
        {
            "x": inc.geometry.x,
            "y": inc.geometry.y,
            "date": inc["date"].dt.strftime("%d/%m/%Y"),
        }
    ).to_csv(csv, index=False, float_format="%.6f")
    table = count_incidents(
        units, csv, date_column="date", x="x", y="y", crs="EPSG:32727", date_format="dmy",
        tolerance_m=30.0, pre=YEAR_2024, post=YEAR_2025,
    )  # fmt: skip
    pd.testing.assert_frame_equal(table.counts, city_counts.counts[["pre", "post"]])


def test_point_layer_file(tmp_path, units, region, city_counts):
    # Source: the sample incidents written to GeoJSON in EPSG:4326 and read back.
    path = tmp_path / "incidents.geojson"
    out = region.incidents.to_crs(4326)
    out["date"] = out["date"].dt.strftime("%Y-%m-%d")
    out.to_file(path, driver="GeoJSON", engine="pyogrio", COORDINATE_PRECISION=12)
    table = count_incidents(
        units, path, date_column="date", tolerance_m=30.0, pre=YEAR_2024, post=YEAR_2025
    )
    pd.testing.assert_frame_equal(table.counts, city_counts.counts[["pre", "post"]])


# ------------------------------------------------------------------- snapping rules


def test_feet_crs_honours_metre_tolerance():
    # Source: pyproj's unit definition, 1 US survey foot = 1200/3937 m; a point
    # 25 m from a segment is within 30 m, one 35 m away is not (analytic). Read
    # as feet, 30 "feet" (9.1 m) would drop both.
    feet = "+proj=utm +zone=27 +south +datum=WGS84 +units=us-ft +no_defs"
    segs = _line_units(ids=(1,), crs=feet)
    assert segs.metres_per_unit == pytest.approx(1200 / 3937)
    points = pd.DataFrame(
        {"x": [X0 + 50, X0 + 50], "y": [Y0 + 25, Y0 + 35], "date": ["2024-05-01"] * 2}
    )
    # Points given in metres (EPSG:32727) and reprojected to the feet CRS.
    table = count_incidents(
        segs, points, date_column="date", x="x", y="y", crs="EPSG:32727",
        tolerance_m=30.0, pre=YEAR_2024, post=YEAR_2025,
    )  # fmt: skip
    assert table.counts.loc[1, "pre"] == 1
    assert table.drops.outside_tolerance == 1
    # The same points already in the feet CRS (no reprojection on our side).
    in_feet = gpd.GeoDataFrame(
        points[["date"]], geometry=gpd.points_from_xy(points.x, points.y), crs=32727
    ).to_crs(feet)
    table = count_incidents(
        segs, in_feet, date_column="date", tolerance_m=30.0, pre=YEAR_2024, post=YEAR_2025
    )
    assert (table.counts.loc[1, "pre"], table.drops.outside_tolerance) == (1, 1)


def test_tie_goes_to_smallest_id_and_is_reported():
    # Source: analytic geometry: a point halfway between parallel streets 20 m
    # apart is 10 m from both; the documented rule gives it to the smaller id.
    for ids, ys in (((7, 3), (10.0, -10.0)), ((3, 7), (-10.0, 10.0))):
        segs = _line_units(ids=ids, ys=ys)
        points = pd.DataFrame(
            {"x": [X0 + 50, X0 + 50], "y": [Y0, Y0 + 12], "date": ["2024-05-01"] * 2}
        )
        table = count_incidents(
            segs, points, date_column="date", x="x", y="y", crs="EPSG:32727",
            tolerance_m=30.0, pre=YEAR_2024, post=YEAR_2025,
        )  # fmt: skip
        top = 7 if ys[ids.index(7)] > 0 else 3
        assert table.counts.loc[3, "pre"] == 1 + (top == 3)
        assert table.counts.loc[7, "pre"] == (top == 7)
        assert table.drops.ties == 1
        assert "smallest id" in str(table.drops)


def test_tolerance_is_inclusive():
    # Source: analytic: a point exactly 30 m from the segment is within 30 m,
    # as for shapely STRtree.query_nearest(max_distance=30).
    segs = _line_units()
    points = pd.DataFrame({"x": [X0 + 50], "y": [Y0 + 30.0], "date": ["2024-05-01"]})
    kw = dict(date_column="date", x="x", y="y", crs="EPSG:32727", pre=YEAR_2024, post=YEAR_2025)
    assert count_incidents(segs, points, tolerance_m=30.0, **kw).counts.loc[1, "pre"] == 1
    tree = shapely.STRtree(np.asarray(segs.geometry.array))
    assert tree.query_nearest(shapely.points([X0 + 50], [Y0 + 30.0]), max_distance=30.0).size
    assert count_incidents(segs, points, tolerance_m=29.99, **kw).counts.loc[1, "pre"] == 0


# ---------------------------------------------------------------------- drops

# One CSV row per drop reason, plus two counted rows (analytic expectations).
_DROP_ROWS = pd.DataFrame(
    {
        "x": [X0 + 50, "", X0 + 50, X0 + 50, X0 + 50, X0 + 50, X0 + 50, "east"],
        "y": [Y0 + 5, Y0 + 5, Y0 + 5, Y0 + 5, Y0 + 5, Y0 + 80, Y0 - 2, Y0],
        "date": [
            "2024-03-01", "2024-03-01", "", "2024-02-30", "2023-06-01",
            "2025-03-01", "2025-07-04T22:15:00+02:00", "2024-03-01",
        ],
        "kind": ["a", "a", "a", "a", "a", "a", "b", "a"],
    }
)  # fmt: skip
_EXPECTED = {
    "missing coordinates": [3, 9],  # CSV lines (line 1 is the header)
    "missing date": [4],
    "unparseable date": [5],
    "outside periods": [6],
    "outside tolerance": [7],
}


@pytest.fixture(scope="module")
def dropped(tmp_path_factory):
    folder = tmp_path_factory.mktemp("drops")
    csv = folder / "incidents.csv"
    _DROP_ROWS.to_csv(csv, index=False)
    table = count_incidents(
        _line_units(), csv, date_column="date", x="x", y="y", crs="EPSG:32727",
        type_column="kind", by_type=True, tolerance_m=30.0, pre=YEAR_2024, post=YEAR_2025,
        dropped_path=folder / "dropped.csv",
    )  # fmt: skip
    return table, pd.read_csv(folder / "dropped.csv")


def test_counted_rows(dropped):
    # Source: analytic: line 2 (2024, 5 m) and line 8 (2025, 2 m; the time and
    # offset after the date are ignored) are counted on the only segment.
    table, _ = dropped
    assert table.counts.loc[1, ["pre", "post"]].tolist() == [1, 1]
    assert table.counts.loc[1, ["pre__a", "post__b"]].tolist() == [1, 1]
    assert table.drops.n_counted == 2


@pytest.mark.parametrize("reason", REASONS)
def test_every_drop_reason_is_named(dropped, reason):
    # Source: the hand-made rows above, one (or two) per reason.
    table, side = dropped
    assert table.drops.counts()[reason] == len(_EXPECTED[reason])
    assert f"({reason})" in str(table.drops)
    assert sorted(side.loc[side["reason"] == reason, "line"]) == _EXPECTED[reason]
    assert table.drops.to_frame().loc[reason, "incidents"] == len(_EXPECTED[reason])


def test_side_file_keeps_the_input_columns(dropped):
    _, side = dropped
    assert {"line", "reason", "x", "y", "date", "kind"} <= set(side.columns)
    assert len(side) == sum(len(v) for v in _EXPECTED.values())


def test_no_incident_near_any_unit_hints_at_the_crs():
    segs = _line_units()
    points = pd.DataFrame({"x": [X0 + 5000], "y": [Y0], "date": ["2024-05-01"]})
    table = count_incidents(
        segs, points, date_column="date", x="x", y="y", crs="EPSG:32727",
        tolerance_m=30.0, pre=YEAR_2024, post=YEAR_2025,
    )  # fmt: skip
    assert "CRS" in str(table.drops)


# ------------------------------------------------- the stop on mostly dropped incidents


def _city_lon_lat(region, years=("2024", "2025")) -> pd.DataFrame:
    points = region.incidents.to_crs(4326)
    dates = pd.to_datetime(points["date"]).dt.strftime("%Y-%m-%d")
    keep = dates.str[:4].isin(years).to_numpy()
    return pd.DataFrame(
        {"date": dates[keep], "lon": points.geometry.x[keep], "lat": points.geometry.y[keep]}
    ).iloc[::20]


def test_swapped_lon_lat_stops_counting_and_says_why(units, region, tmp_path):
    frame = _city_lon_lat(region).rename(columns={"lon": "lat", "lat": "lon"})
    dropped = tmp_path / "dropped.csv"
    kw = dict(date_column="date", lon="lon", lat="lat", tolerance_m=30.0, dropped_path=dropped)
    with pytest.raises(InputError, match="swapped") as err:
        count_checked(units, frame, pre=YEAR_2024, post=YEAR_2025, **kw)
    # Arithmetic: every row is read and, being off the map, dropped.
    assert f"{len(frame):,} read, 0 counted, {len(frame):,} dropped" in str(err.value)
    assert "outside the units' extent" in str(err.value)
    assert not dropped.exists()  # nothing written before the stop


def test_empty_period_has_its_own_error(units, region):
    frame = _city_lon_lat(region)
    kw = dict(date_column="date", lon="lon", lat="lat", tolerance_m=30.0)
    with pytest.raises(InputError, match="post-period 2031-01-01") as err:
        count_checked(units, frame, pre=YEAR_2024, post=("2031-01-01", "2031-12-31"), **kw)
    # The message gives the span of the dates read: the input's first and last date.
    assert f"dated {frame['date'].min()} to {frame['date'].max()}" in str(err.value)


def test_dropped_share_limit_and_its_recorded_override(units, region):
    frame = _city_lon_lat(region)
    # Half of the rows moved outside both periods plus the few dropped by tolerance: above 50%.
    moved = frame.assign(date=np.where(np.arange(len(frame)) % 4 != 0, "2019-06-01", frame["date"]))
    kw = dict(date_column="date", lon="lon", lat="lat", tolerance_m=30.0)
    with pytest.raises(InputError, match="more than the limit of 50%") as err:
        count_checked(units, moved, pre=YEAR_2024, post=YEAR_2025, **kw)
    assert "outside periods" in str(err.value) and "are the periods right" in str(err.value)
    table = count_checked(units, moved, pre=YEAR_2024, post=YEAR_2025, max_dropped_share=0.9, **kw)
    assert table.drops.max_dropped_share == 0.9
    assert "set to 90% (default 50%) on purpose" in str(table.drops)
    # The stop changes no count: with it off, the counts are the same.
    free = count_incidents(units, moved, pre=YEAR_2024, post=YEAR_2025, **kw)
    pd.testing.assert_frame_equal(free.counts, table.counts)
    with pytest.raises(InputError, match="between 0 and 1"):
        count_checked(units, moved, pre=YEAR_2024, post=YEAR_2025, max_dropped_share=1.5, **kw)


# ---------------------------------------------------------------------- dates


def test_ambiguous_dates_raise_with_examples():
    segs = _line_units()
    points = pd.DataFrame(
        {"x": [X0 + 50] * 3, "y": [Y0] * 3, "date": ["2024-03-01", "03/04/2024", "05/06/2024"]}
    )
    kw = dict(date_column="date", x="x", y="y", crs="EPSG:32727", tolerance_m=30.0)
    with pytest.raises(InputError, match="03/04/2024") as err:
        count_incidents(segs, points, pre=YEAR_2024, post=YEAR_2025, **kw)
    assert "date_format" in str(err.value)
    # Source: calendar: day first, 03/04/2024 is 3 April; month first, 4 March.
    april = count_incidents(
        segs, points.iloc[1:2], pre=("2024-04-03", "2024-04-03"), post=YEAR_2025,
        date_format="dmy", **kw,
    )  # fmt: skip
    march = count_incidents(
        segs, points.iloc[1:2], pre=("2024-03-04", "2024-03-04"), post=YEAR_2025,
        date_format="mdy", **kw,
    )  # fmt: skip
    assert april.counts.loc[1, "pre"] == 1 and march.counts.loc[1, "pre"] == 1


def test_unreadable_date_column_raises():
    segs = _line_units()
    points = pd.DataFrame({"x": [X0], "y": [Y0], "date": ["March 3rd"]})
    with pytest.raises(InputError, match="March 3rd"):
        count_incidents(
            segs, points, date_column="date", x="x", y="y", crs="EPSG:32727",
            tolerance_m=30.0, pre=YEAR_2024, post=YEAR_2025,
        )  # fmt: skip


# -------------------------------------------------------------------- periods


@pytest.mark.parametrize(
    ("pre", "post", "words"),
    [
        (("2024-01-01", "2024-12-31"), ("2024-12-31", "2025-06-30"), "overlap"),
        (("2024-01-01", "2024-12-31"), ("2024-06-01", "2024-06-30"), "overlap"),
        (("2025-01-01", "2025-12-31"), ("2024-01-01", "2024-12-31"), "before the pre-period"),
        (("2024-12-31", "2024-01-01"), YEAR_2025, "before it starts"),
        (("2024-01-01", "31/12/2024"), YEAR_2025, "not a date"),
    ],
)
def test_bad_periods_raise(pre, post, words):
    points = pd.DataFrame({"x": [X0], "y": [Y0], "date": ["2024-05-01"]})
    with pytest.raises(InputError, match=words):
        count_incidents(
            _line_units(), points, date_column="date", x="x", y="y", crs="EPSG:32727",
            tolerance_m=30.0, pre=pre, post=post,
        )  # fmt: skip


def test_period_lengths(city_counts):
    # Source: calendar: 2024 is a leap year (366 days), 2025 is not (365).
    assert (city_counts.days_pre, city_counts.days_post) == (366, 365)
    assert city_counts.pre == (dt.date(2024, 1, 1), dt.date(2024, 12, 31))


def test_period_ends_are_included():
    # Source: the closed-interval rule: incidents on the first and last day count.
    points = pd.DataFrame(
        {"x": [X0 + 50] * 4, "y": [Y0] * 4,
         "date": ["2024-03-01", "2024-03-31", "2024-02-29", "2024-04-01"]}
    )  # fmt: skip
    table = count_incidents(
        _line_units(), points, date_column="date", x="x", y="y", crs="EPSG:32727",
        tolerance_m=30.0, pre=("2024-03-01", "2024-03-31"), post=YEAR_2025,
    )  # fmt: skip
    assert table.counts.loc[1, "pre"] == 2 and table.drops.outside_periods == 2


# ------------------------------------------------------------------ bad input


def test_bad_inputs_raise_named_errors():
    segs = _line_units()
    points = pd.DataFrame({"x": [X0], "y": [Y0], "date": ["2024-05-01"]})
    kw = dict(tolerance_m=30.0, pre=YEAR_2024, post=YEAR_2025)
    with pytest.raises(CRSError, match="crs="):
        count_incidents(segs, points, date_column="date", x="x", y="y", **kw)
    with pytest.raises(InputError, match="'when'"):
        count_incidents(segs, points, date_column="when", x="x", y="y", crs=32727, **kw)
    with pytest.raises(CRSError, match="not longitude/latitude"):
        count_incidents(segs, points, date_column="date", lon="x", lat="y", **kw)
    lines = gpd.GeoDataFrame(
        {"date": ["2024-05-01"]}, geometry=[shapely.LineString([(X0, Y0), (X0, Y0 + 1)])], crs=32727
    )
    with pytest.raises(GeometryError, match="points"):
        count_incidents(segs, lines, date_column="date", **kw)
    with pytest.raises(InputError, match="tolerance_m"):
        count_incidents(segs, points, date_column="date", x="x", y="y", crs=32727,
                        tolerance_m=-1, pre=YEAR_2024, post=YEAR_2025)  # fmt: skip


def test_callers_frame_is_not_changed(region, units):
    before = region.incidents.copy()
    count_incidents(
        units, region.incidents, date_column="date", tolerance_m=30.0, pre=YEAR_2024,
        post=YEAR_2025,
    )  # fmt: skip
    pd.testing.assert_frame_equal(region.incidents, before)


# -------------------------------------------------------------- property test


_JUNK = 10_000  # a day offset standing for an unreadable date


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    st.lists(
        st.tuples(
            st.one_of(st.none(), st.floats(-100, 400)),  # x offset (None: missing)
            st.floats(-100, 100),  # y offset
            st.one_of(st.none(), st.integers(-400, 900), st.just(_JUNK)),  # day offset
        ),
        max_size=60,
    )
)
@example(rows=[(0.0, 0.0, 366 + 365 - 1)])  # the last day of the post period is counted
def test_counted_plus_dropped_is_every_incident(rows):
    # Two horizontal 100 m segments at y = 0 and y = 40 (metres above Y0).
    segs = _line_units(ids=(1, 2), ys=(0.0, 40.0))
    day0 = np.datetime64("2024-01-01")
    frame = pd.DataFrame(
        {
            "x": pd.Series([None if a is None else X0 + a for a, _, _ in rows], dtype=object),
            "y": [Y0 + b for _, b, _ in rows],
            "date": pd.Series(
                [
                    None if d is None else ("junk" if d == _JUNK else str(day0 + d))
                    for *_, d in rows
                ],
                dtype=object,
            ),
        }
    )
    kw = dict(date_column="date", x="x", y="y", crs="EPSG:32727", pre=YEAR_2024, post=YEAR_2025)
    days = [d for *_, d in rows if d is not None]
    if days and all(d == _JUNK for d in days):
        with pytest.raises(InputError, match="no date"):
            count_incidents(segs, frame, tolerance_m=25.0, **kw)
        return
    # Source: analytic point-to-segment distance to the nearer of the two streets.
    xs = np.array([np.nan if a is None else a for a, _, _ in rows], dtype=float)
    ys = np.array([b for _, b, _ in rows], dtype=float)
    dx = np.maximum(np.maximum(-xs, xs - 100.0), 0.0)
    dist = np.minimum(np.hypot(dx, ys), np.hypot(dx, ys - 40.0))
    assume(not np.any(np.abs(dist - 25.0) < 1e-6))  # no float coin-flips at the edge
    table = count_incidents(segs, frame, tolerance_m=25.0, **kw)
    d = table.drops
    # Source: bookkeeping invariant: each incident is counted once or dropped once.
    assert d.n_incidents == len(rows)
    assert d.n_counted + d.n_dropped == len(rows)
    assert int(table.counts[["pre", "post"]].to_numpy().sum()) == d.n_counted
    # Source: the documented order of reasons, applied by hand to the generated rows.
    no_xy = np.isnan(xs)
    day = np.array([-(10**6) if v is None else v for *_, v in rows], dtype=np.int64)
    no_date = np.array([v is None for *_, v in rows], dtype=bool) & ~no_xy
    junk = (day == _JUNK) & ~no_xy
    in_periods = (day >= 0) & (day <= 366 + 365 - 1)  # 2024 (366 days) and 2025 (365)
    outside = ~no_xy & ~no_date & ~junk & ~in_periods
    far = ~no_xy & ~no_date & ~junk & in_periods & (dist > 25.0)
    assert d.counts() == {
        "missing coordinates": int(no_xy.sum()),
        "missing date": int(no_date.sum()),
        "unparseable date": int(junk.sum()),
        "outside periods": int(outside.sum()),
        "outside tolerance": int(far.sum()),
    }


# -------------------------------------------------------- ready counts, storage


def test_from_counts_round_trip_and_unknown_ids(city_counts, units):
    frame = city_counts.to_frame().reset_index()
    again = OutcomeTable.from_counts(
        frame, "segment_id", units=units, pre=YEAR_2024, post=YEAR_2025
    )
    pd.testing.assert_frame_equal(again.counts, city_counts.counts)
    assert again.types == tuple(
        c.removeprefix("pre__") for c, _ in city_counts.type_columns.values()
    )
    bad = pd.concat([frame, frame.iloc[:1].assign(segment_id="NOPE-1")])
    with pytest.raises(InputError, match="NOPE-1"):
        OutcomeTable.from_counts(bad, "segment_id", units=units, pre=YEAR_2024, post=YEAR_2025)
    short = frame.iloc[1:]
    with pytest.raises(InputError, match=str(frame["segment_id"].iloc[0])):
        OutcomeTable.from_counts(short, "segment_id", units=units, pre=YEAR_2024, post=YEAR_2025)
    filled = OutcomeTable.from_counts(
        short, "segment_id", units=units, pre=YEAR_2024, post=YEAR_2025, fill_missing=True
    )
    assert filled.counts["pre"].iloc[0] == 0
    with pytest.raises(InputError, match="whole numbers"):
        OutcomeTable.from_counts(
            frame.assign(pre=-1), "segment_id", units=units, pre=YEAR_2024, post=YEAR_2025
        )


def test_change_is_post_minus_pre(city_counts):
    # Source: definition of the change score.
    frame = city_counts.to_frame()
    np.testing.assert_array_equal(frame["change"], frame["post"] - frame["pre"])
    assert list(city_counts.ids) == list(frame.index)


def test_save_and_load_in_trial_file(tmp_path, region, city_counts):
    # A minimal trial file: the unit layer and the meta table TrialFile needs.
    path = tmp_path / "trial.gpkg"
    pyogrio.write_dataframe(region.segments, path, layer="units", driver="GPKG")
    pyogrio.write_dataframe(
        pd.DataFrame({"key": ["id_column", "locked"], "value": ["segment_id", "true"]}),
        path, layer="trial_meta", driver="GPKG", append=True,
    )  # fmt: skip
    trial = TrialFile.open(path)
    # The trial file's own unit layer gives the same counts as the UnitSet.
    table = count_incidents(
        trial, region.incidents, date_column="date", type_column="incident_type",
        by_type=True, tolerance_m=30.0, pre=YEAR_2024, post=YEAR_2025,
    )  # fmt: skip
    pd.testing.assert_frame_equal(table.counts, city_counts.counts)
    saved = save_outcomes(path, table)
    assert "outcomes" in saved.layers and saved.meta["outcomes_pre"] == "2024-01-01/2024-12-31"
    back = load_outcomes(saved)
    pd.testing.assert_frame_equal(back.counts, table.counts)
    assert (back.pre, back.post, back.tolerance_m, back.types) == (
        table.pre, table.post, 30.0, table.types,
    )  # fmt: skip
    assert back.drops.counts() == table.drops.counts()
    wrong = OutcomeTable.from_counts(
        table.counts.iloc[:5], None, units=UnitSet.from_frame(region.segments.iloc[:5], "segment_id"),
        pre=YEAR_2024, post=YEAR_2025,
    )  # fmt: skip
    with pytest.raises(InputError, match="do(es)? not match"):
        save_outcomes(saved, wrong)


def test_observed_incidents_count_as_count_incidents_does(units, region, city_counts):
    # Identity: the bundle passes every field on to count_incidents, so its counts are the
    # city counts above (themselves checked against geopandas sjoin_nearest).
    observed = ObservedIncidents(
        region.incidents, pre=YEAR_2024, post=YEAR_2025, type_column="incident_type",
        by_type=True,
    )  # fmt: skip
    assert observed.tolerance_m == 30.0 and observed.date_column == "date"  # the defaults
    table = observed.count(units, max_dropped_share=None)
    pd.testing.assert_frame_equal(table.counts, city_counts.counts)
    assert table.drops.counts() == city_counts.drops.counts()
    assert (table.pre, table.post, table.types) == (
        city_counts.pre, city_counts.post, city_counts.types,
    )  # fmt: skip


def test_observed_incidents_keep_types_and_tolerance_reach_the_count(units, region):
    # Source: analytic: counting one type only gives, unit by unit, that type's own columns
    # of the count by type (snapping and dating are per incident).
    some = str(pd.Series(region.incidents["incident_type"]).dropna().iloc[0])
    observed = ObservedIncidents(
        region.incidents, pre=YEAR_2024, post=YEAR_2025, type_column="incident_type",
        keep_types=[some],
    )  # fmt: skip
    assert observed.keep_types == (some,)  # frozen as a tuple
    kept = observed.count(units, max_dropped_share=None)
    full = ObservedIncidents(
        region.incidents, pre=YEAR_2024, post=YEAR_2025, type_column="incident_type",
        by_type=True,
    ).count(units, max_dropped_share=None)  # fmt: skip
    pre_column, post_column = full.type_columns[some]
    assert kept.counts["pre"].sum() > 0
    np.testing.assert_array_equal(kept.counts["pre"], full.counts[pre_column])
    np.testing.assert_array_equal(kept.counts["post"], full.counts[post_column])
    with pytest.raises(InputError, match="tolerance_m must be a number of metres"):
        ObservedIncidents(region.incidents, pre=YEAR_2024, post=YEAR_2025, tolerance_m=-1).count(
            units
        )


def test_observed_points_read_every_date_format_as_the_count_does(units, region):
    # Identity: the points are the incidents' own geometry (shapely coordinates) and their
    # dates, whichever way the dates are written; a day-first copy gives the same points.
    frame = region.incidents
    observed = ObservedIncidents(frame, pre=YEAR_2024, post=YEAR_2025)
    points = observed.points(units.crs)
    assert len(points) == len(frame)
    np.testing.assert_allclose(points["x"], frame.geometry.x)
    np.testing.assert_allclose(points["y"], frame.geometry.y)
    assert (points["date"] == pd.to_datetime(frame["date"]).dt.strftime("%Y-%m-%d")).all()
    day_first = frame.assign(date=pd.to_datetime(frame["date"]).dt.strftime("%d/%m/%Y"))
    again = ObservedIncidents(day_first, pre=YEAR_2024, post=YEAR_2025, date_format="dmy")
    pd.testing.assert_frame_equal(again.points(units.crs), points)
    some = str(frame["incident_type"].dropna().iloc[0])
    only = ObservedIncidents(
        frame, pre=YEAR_2024, post=YEAR_2025, type_column="incident_type", keep_types=[some]
    ).points(units.crs)
    assert len(only) == int((frame["incident_type"] == some).sum())


def test_snap_matches_nearest_query_with_id_tie_break():
    # Reference: shapely's STRtree.query_nearest(max_distance, all_matches=True) gives every
    # unit at the nearest distance (within the tolerance, inclusive); the pick is the smallest
    # id among them, and a tie is more than one. Lines of a lattice make ties at the nodes.
    from geoexp.outcomes._snap import id_rank, snap

    rng = np.random.default_rng(5)
    nodes = [(i * 100.0, j * 100.0) for i in range(6) for j in range(6)]
    lines = [shapely.LineString([(x, y), (x + 100.0, y)]) for x, y in nodes if x < 500]
    lines += [shapely.LineString([(x, y), (x, y + 100.0)]) for x, y in nodes if y < 500]
    lines += [shapely.LineString(rng.uniform(0, 500, (3, 2))) for _ in range(20)]
    geometry = np.asarray(lines, dtype=object)
    ids = rng.permutation(len(lines)) * 3 + 1
    xy = np.vstack([rng.uniform(-40, 540, (400, 2)), np.asarray(nodes), [[50.0, 30.0]]])
    got = snap(xy[:, 0], xy[:, 1], geometry, id_rank(ids), 30.0)
    tree = shapely.STRtree(geometry)
    (p, u), d = tree.query_nearest(
        shapely.points(xy), max_distance=30.0, all_matches=True, return_distance=True
    )
    for k in range(len(xy)):
        mine = u[p == k]
        if mine.size == 0:
            assert got.unit[k] == -1 and np.isnan(got.distance[k]) and not got.tied[k]
            continue
        assert got.unit[k] == mine[np.argmin(ids[mine])]
        assert got.distance[k] == d[p == k][0]
        assert got.tied[k] == (mine.size > 1)
    assert got.tied.sum() >= 30 and (got.unit == -1).sum() > 0
