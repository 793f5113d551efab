"""Delivery: visit logs and GPS pings to presence per unit and period."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import shapely

from geoexp.delivery import (
    StayBuilder,
    StayRules,
    UnitIndex,
    read_visits,
    snap_points,
    stays_from_pings,
)
from geoexp.errors import InputError
from geoexp.sampleregion import simulate_pings, synthetic_grid
from geoexp.units import UnitSet

CRS = "EPSG:32727"  # the synthetic grids' CRS (metres)


@pytest.fixture(scope="module")
def grid():
    return synthetic_grid(400, jitter=6.0, seed=3)


@pytest.fixture(scope="module")
def units(grid):
    return UnitSet.from_frame(grid, "unit_id")


# --------------------------------------------------------------------------- snapping


@pytest.mark.parametrize("kind", ["segment", "parcel"])
@pytest.mark.parametrize("seed", [0, 1])
def test_snapping_matches_brute_force_shapely_distances(kind, seed):
    geometry = synthetic_grid(300, kind=kind, jitter=7.0, seed=seed).geometry.to_numpy()
    rank = np.arange(len(geometry))
    index = UnitIndex.build(geometry, rank, piece=20.0)
    rng = np.random.default_rng(seed)
    x0, y0, x1, y1 = shapely.total_bounds(geometry)
    x = rng.uniform(x0 - 40, x1 + 40, 4000)
    y = rng.uniform(y0 - 40, y1 + 40, 4000)
    x[:5] = np.nan  # not snapped
    unit, distance = snap_points(index, x, y, 25.0)
    # Reference: every point-to-unit distance by shapely (brute force, no index).
    with np.errstate(invalid="ignore"):
        full = shapely.distance(shapely.points(x, y)[:, None], geometry[None, :])
    best = np.nanmin(np.where(np.isnan(full), np.inf, full), axis=1)
    within = best <= 25.0
    assert within.sum() > 1000 and (~within).sum() > 100  # both kinds of point are tried
    np.testing.assert_array_equal(unit >= 0, within)
    np.testing.assert_allclose(distance[within], best[within], rtol=0, atol=1e-7)
    np.testing.assert_allclose(full[np.flatnonzero(within), unit[within]], best[within], atol=1e-7)
    assert np.isnan(distance[~within]).all()


def test_snapping_ties_go_to_the_smallest_id():
    # Two segments meeting at (0, 0); a point on the shared corner is at distance 0 from both.
    geometry = np.array(
        [shapely.LineString([(0, 0), (50, 0)]), shapely.LineString([(0, 0), (0, 50)])]
    )
    for rank, expected in (([0, 1], 0), ([1, 0], 1)):
        index = UnitIndex.build(geometry, np.array(rank), piece=10.0)
        unit, distance = snap_points(index, np.array([0.0]), np.array([0.0]), 5.0)
        assert unit[0] == expected and distance[0] == 0.0


# ------------------------------------------------------------------------- stay grouping


def reference_stays(dev, t, x, y, unit, rules: StayRules) -> list[tuple]:
    """Stays by a plain loop over each device's pings in time order (the rules as written)."""
    stays = []
    for d in sorted(set(dev.tolist())):
        idx = [i for i in np.argsort(t, kind="stable") if dev[i] == d]
        run = None
        for a, b in zip(idx[:-1], idx[1:], strict=True):
            dt = float(t[b] - t[a])
            dist = float(np.hypot(x[b] - x[a], y[b] - y[a]))
            slow = dist == 0 if dt == 0 else dist / dt <= rules.max_speed_kmh / 3.6
            if dt <= rules.max_gap_s and slow and unit[a] >= 0 and unit[a] == unit[b]:
                run = [a, b, 2] if run is None else [run[0], b, run[2] + 1]
            else:
                if run is not None:
                    stays.append(run)
                run = None
        if run is not None:
            stays.append(run)
    return sorted(
        (int(dev[a]), int(unit[a]), int(t[a]), int(t[b]), n)
        for a, b, n in stays
        if (t[b] - t[a]) / 60.0 >= rules.min_minutes
    )


def generated_tracks(seed: int, n: int = 3000):
    """Small random tracks: devices that sit, creep, jump and fall silent, at a few units."""
    rng = np.random.default_rng(seed)
    dev = rng.integers(0, 5, n)
    t = np.sort(rng.integers(0, 40 * n, n))  # gaps of 0 to ~80 s, some pings at equal times
    labels = rng.choice([-1, 0, 1, 2], n, p=[0.15, 0.5, 0.25, 0.1])
    # A device keeps its unit for a while: each ping changes it with probability 0.3.
    change = rng.random(n) < 0.3
    unit = labels[np.maximum.accumulate(np.where(change, np.arange(n), 0))]
    x = np.cumsum(rng.choice([0.0, 0.5, 3.0, 400.0], n, p=[0.3, 0.4, 0.25, 0.05]))
    y = np.zeros(n)
    silent = rng.random(n) < 0.03
    t = t + np.cumsum(silent) * 400  # some long silences
    return dev, t.astype(np.int64), x, y, unit.astype(np.int64)


def run_builder(dev, t, x, y, unit, rules, chunk):
    order = np.argsort(t, kind="stable")
    builder = StayBuilder(rules, 1.0)
    out = []
    for start in range(0, len(t), chunk):
        rows = order[start : start + chunk]
        arrays = {
            "dev": dev[rows],
            "t": t[rows],
            "x": x[rows],
            "y": y[rows],
            "unit": unit[rows],
            "row": rows,
        }
        out.append(builder.feed(arrays, last=start + chunk >= len(t)))
    return sorted(
        (int(d), int(u), int(a), int(b), int(n))
        for f in out
        for d, u, a, b, n in zip(f["dev"], f["unit"], f["start"], f["end"], f["pings"], strict=True)
    )


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("chunk", [7, 250, 10_000])
def test_stays_match_a_plain_loop_in_any_chunking(seed, chunk):
    dev, t, x, y, unit = generated_tracks(seed)
    rules = StayRules(max_gap_s=60.0, max_speed_kmh=8.0, min_minutes=1.0)
    expected = reference_stays(dev, t, x, y, unit, rules)
    assert len(expected) > 20  # the tracks do make stays
    assert run_builder(dev, t, x, y, unit, rules, chunk) == expected


def test_driving_through_is_not_a_stay(units, tmp_path):
    # One device drives along a row of segments at 30 km/h, pinging every 30 s: fast steps only.
    # Another parks on a segment for 10 minutes: one stay of 10 minutes.
    line = units.geometry.iloc[0]
    px, py = line.interpolate(0.5, normalized=True).coords[0]
    rows = [
        ("car", f"2025-03-03T10:{m:02d}:{s:02d}", px + 250.0 * (2 * m + s // 30) / 1.0, py)
        for m in range(5)
        for s in (0, 30)
    ]
    rows += [("foot", f"2025-03-03T11:{m:02d}:00", px + 0.5 * (m % 2), py) for m in range(11)]
    frame = pd.DataFrame(rows, columns=["device", "time", "x", "y"])
    frame.to_csv(tmp_path / "p.csv", index=False)
    stays = stays_from_pings(tmp_path / "p.csv", units, x="x", y="y", crs=CRS)
    assert stays.frame["device"].tolist() == ["foot"]
    assert stays.frame["minutes"].tolist() == [10.0]
    assert stays.frame["unit"].tolist() == [units.ids[0]]


def test_pings_csv_and_parquet_agree_and_chunks_do_not_matter(grid, units, tmp_path):
    pings = simulate_pings(grid.geometry.to_numpy(), 30_000, n_devices=8, rng=5)
    pings.drop(columns="stop").to_csv(tmp_path / "p.csv", index=False)
    pings.drop(columns="stop").to_parquet(tmp_path / "p.parquet")
    whole = stays_from_pings(tmp_path / "p.csv", units, x="x", y="y", crs=CRS)
    small = stays_from_pings(tmp_path / "p.csv", units, x="x", y="y", crs=CRS, chunk_rows=997)
    parquet = stays_from_pings(
        tmp_path / "p.parquet", units, x="x", y="y", crs=CRS, chunk_rows=3001
    )
    assert len(whole) > 100
    pd.testing.assert_frame_equal(whole.frame, small.frame)
    pd.testing.assert_frame_equal(whole.frame, parquet.frame)
    # The simulated stops are found at the units the devices stopped at.
    stopped = set(pings.loc[pings["stop"] >= 0, "stop"].map(lambda i: units.ids[i]))
    assert set(whole.frame["unit"]) <= stopped


def test_dosage_by_iso_week_sums_the_stays(units, grid, tmp_path):
    pings = simulate_pings(grid.geometry.to_numpy(), 40_000, n_devices=4, rng=2)
    pings.drop(columns="stop").to_parquet(tmp_path / "p.parquet")
    stays = stays_from_pings(tmp_path / "p.parquet", units, x="x", y="y", crs=CRS)
    weekly = stays.dosage("week")
    # ISO weeks start on Monday: pandas' weekly periods ending on Sunday (pandas docs).
    starts = pd.PeriodIndex(stays.frame["start"], freq="W-SUN").start_time.unique()
    assert set(weekly.frame["period"]) == set(starts.to_numpy().astype("datetime64[D]"))
    assert weekly.frame["minutes"].sum() == pytest.approx(stays.frame["minutes"].sum())
    assert weekly.frame["visits"].sum() == len(stays)
    wide = weekly.wide("visits")
    assert list(wide.index) == list(units.ids) and wide.to_numpy().sum() == len(stays)
    total = stays.dosage("period").per_unit()
    np.testing.assert_allclose(total["minutes"], weekly.wide().sum(axis=1))
    daily = stays.dosage("day", start="2025-01-07", end="2025-01-07")
    assert (daily.frame["period"] == np.datetime64("2025-01-07")).all()


def test_pings_that_go_back_in_time_are_named(units, tmp_path):
    (tmp_path / "p.csv").write_text(
        "device,time,x,y\na,2025-01-01T10:00:00,0,0\na,2025-01-01T10:01:00,0,0\n"
        "b,2025-01-01T10:00:00,0,0\na,2025-01-01T09:59:00,0,0\n"
    )
    with pytest.raises(InputError, match="lines 5"):
        stays_from_pings(tmp_path / "p.csv", units, x="x", y="y", crs=CRS)


def test_ping_input_errors_name_the_column_and_rows(units, tmp_path):
    (tmp_path / "p.csv").write_text("device,time,x,y\na,2025-01-01T10:00:00,0,0\na,soon,0,0\n")
    with pytest.raises(InputError, match=r"'time'.*lines 3.*'soon'"):
        stays_from_pings(tmp_path / "p.csv", units, x="x", y="y", crs=CRS)
    with pytest.raises(InputError, match="no column 'when'"):
        stays_from_pings(tmp_path / "p.csv", units, time="when", x="x", y="y", crs=CRS)
    with pytest.raises(InputError, match="no CRS"):
        stays_from_pings(tmp_path / "p.csv", units, x="x", y="y")


# ----------------------------------------------------------------------------- visit logs


def test_visit_log_by_unit_id_and_by_position(units, tmp_path):
    first, second = units.ids[0], units.ids[5]
    px, py = units.geometry.iloc[5].interpolate(0.5, normalized=True).coords[0]
    (tmp_path / "v.csv").write_text(
        "unit,start,end,team,activity\n"
        f"{first},2025-03-03 10:00,2025-03-03 10:15,A,foot patrol\n"
        f"{second},2025-03-04T22:50,2025-03-04T23:05,B,\n"
    )
    log = read_visits(
        tmp_path / "v.csv",
        units,
        unit_column="unit",
        team_column="team",
        activity_column="activity",
    )
    assert log.frame["unit"].tolist() == [first, second]
    assert log.frame["minutes"].tolist() == [15.0, 15.0]
    assert log.frame["activity"].tolist() == ["foot patrol", None]
    frame = pd.DataFrame(
        {"x": [px + 3.0], "y": [py], "start": ["2025-03-04 22:50"], "end": ["2025-03-04 23:05"]}
    )
    placed = read_visits(frame, units, x="x", y="y", crs=CRS)
    assert placed.frame["unit"].tolist() == [second]


@pytest.mark.parametrize(
    ("row", "message"),
    [
        ("999999,2025-03-03 10:00,2025-03-03 10:15", r"unit ids not in .*'unit'.*lines 3"),
        ("{id},2025-03-03 10:00,2025-03-03 09:15", r"ends before it starts.*'end'.*lines 3"),
        ("{id},03/03/2025 10:00,2025-03-03 10:15", r"cannot be read.*'start'.*lines 3"),
        ("{id},2025-03-03 10:00,2025-03-04 10:15", r"longer than 12 hours.*lines 3"),
        ("{id},2025-03-03 10:00Z,2025-03-03 10:15", r"UTC offset.*'start'.*lines 3"),
        ("{id},,2025-03-03 10:15", r"empty times.*'start'.*lines 3"),
    ],
)
def test_visit_log_errors_name_file_column_and_rows(units, tmp_path, row, message):
    good = f"{units.ids[0]},2025-03-03 09:00,2025-03-03 09:20"
    (tmp_path / "v.csv").write_text(f"unit,start,end\n{good}\n{row.format(id=units.ids[1])}\n")
    with pytest.raises(InputError, match=message):
        read_visits(tmp_path / "v.csv", units, unit_column="unit")


def test_visit_log_position_far_from_every_unit_is_an_error(units):
    frame = pd.DataFrame(
        {"x": [0.0], "y": [0.0], "start": ["2025-03-04 22:50"], "end": ["2025-03-04 23:05"]}
    )
    with pytest.raises(InputError, match=r"no unit within 25 m.*'x/y'.*rows 0"):
        read_visits(frame, units, x="x", y="y", crs=CRS)


def test_pings_in_longitude_latitude_give_the_same_stays(grid, units, tmp_path):
    # pyproj's inverse projection (UTM zone 27S to WGS 84) round-trips to well under a millimetre,
    # so the same pings given as longitude/latitude make the same stays.
    import pyproj

    pings = simulate_pings(grid.geometry.to_numpy(), 20_000, n_devices=5, rng=9)
    lon, lat = pyproj.Transformer.from_crs(CRS, 4326, always_xy=True).transform(
        pings["x"].to_numpy(), pings["y"].to_numpy()
    )
    degrees = pings.assign(lon=lon, lat=lat).drop(columns=["x", "y", "stop"])
    degrees.loc[3, "lon"] = np.nan  # one ping without a position
    degrees.to_csv(tmp_path / "deg.csv", index=False)
    metres = pings.drop(columns="stop")
    metres.loc[3, ["x", "y"]] = np.nan
    metres.to_csv(tmp_path / "m.csv", index=False)
    a = stays_from_pings(tmp_path / "deg.csv", units, lon="lon", lat="lat")
    b = stays_from_pings(tmp_path / "m.csv", units, x="x", y="y", crs=CRS)
    assert a.summary["pings_without_position"] == "1"
    pd.testing.assert_frame_equal(a.frame, b.frame)


def test_simulated_patrols_favour_the_planned_places(grid, units, tmp_path):
    # Half of the stops go to 20 favoured units: far more of the minutes present are there
    # than their share of the units (20 of 400 = 5%), yet not all (imperfect delivery).
    favoured = np.arange(0, 400, 20)
    pings = simulate_pings(
        grid.geometry.to_numpy(), 40_000, n_devices=6, favoured=favoured, favour_share=0.5, rng=4
    )
    pings.drop(columns="stop").to_parquet(tmp_path / "p.parquet")
    stays = stays_from_pings(tmp_path / "p.parquet", units, x="x", y="y", crs=CRS)
    at_favoured = stays.frame["unit"].isin(units.ids[favoured])
    share = stays.frame.loc[at_favoured, "minutes"].sum() / stays.frame["minutes"].sum()
    assert 0.3 < share < 0.7
