"""The weekly delivery monitor and the delivery commands, on the demo trial."""

from __future__ import annotations

import shutil

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from geoexp.cli import app
from geoexp.delivery import RECORD_LAYER, delivery_week, stays_from_pings
from geoexp.errors import InputError
from geoexp.sampleregion import simulate_pings
from geoexp.trialfile import TrialFile, append_record, verify_trial
from geoexp.units import UnitSet


@pytest.fixture()
def trial_copy(demo, tmp_path):
    path = tmp_path / "trial.gpkg"
    shutil.copy2(demo / "trial.gpkg", path)
    return path


@pytest.fixture()
def pings_file(trial_copy, tmp_path):
    units = TrialFile.open(trial_copy).units()
    pings = simulate_pings(units.geometry.to_numpy(), 60_000, n_devices=12, rng=3)
    path = tmp_path / "pings.parquet"
    pings.drop(columns="stop").to_parquet(path)
    return path, units.crs.to_string()


def test_week_summary_matches_a_direct_count(trial_copy, pings_file):
    path, crs = pings_file
    tf = TrialFile.open(trial_copy)
    units = UnitSet.from_frame(tf.units(), None)
    weekly = stays_from_pings(path, units, x="x", y="y", crs=crs).dosage("week")
    assignment = tf.assignment()
    week = delivery_week(assignment, weekly, "2025-01-08", planned_minutes=30)
    assert str(week.week) == "2025-01-06"  # the Monday of that ISO week
    # Direct count with pandas: minutes in that week per unit, zero for units without presence.
    rows = weekly.frame[weekly.frame["period"] == np.datetime64("2025-01-06")]
    minutes = rows.set_index("unit")["minutes"].reindex(assignment.index, fill_value=0.0)
    treated = assignment["condition"].astype(str) == "treated"
    assert week.by_condition.loc["treated", "at_dose_share"] == pytest.approx(
        (minutes[treated] >= 30).mean()
    )
    assert week.by_condition.loc["pure_control", "mean_minutes"] == pytest.approx(
        minutes[assignment["condition"].astype(str) == "pure_control"].mean()
    )
    assert set(week.under_served.index) == set(minutes[treated & (minutes < 30)].index)
    assert set(week.visited_controls.index) == set(minutes[~treated & (minutes > 0)].index)
    assert week.by_condition["places"].sum() == len(assignment)


def test_monitor_command_appends_dated_records_and_keeps_the_assignment(
    trial_copy, pings_file, tmp_path
):
    path, crs = pings_file
    before = TrialFile.open(trial_copy).assignment()
    # the demo's own monitor has recorded a week of 2026 already
    kept = TrialFile.open(trial_copy).read(RECORD_LAYER)
    args = [
        "monitor",
        str(trial_copy),
        "--pings",
        str(path),
        "--x",
        "x",
        "--y",
        "y",
        "--crs",
        crs,
        "--planned-minutes",
        "30",
        "--week",
        "2025-01-06",
        "--chart",
        str(tmp_path / "chart.png"),
        "--lists",
        str(tmp_path / "lists.csv"),
        "--map",
        str(tmp_path / "map.png"),
    ]
    for _ in range(2):
        result = CliRunner().invoke(app, args)
        assert result.exit_code == 0, result.output
    assert "planned dose 30 minutes" in result.output
    tf = TrialFile.open(trial_copy)
    records = tf.read(RECORD_LAYER)
    n_conditions = before["condition"].nunique()
    assert len(records) == len(kept) + 2 * n_conditions  # appended, not overwritten
    pd.testing.assert_frame_equal(records.iloc[: len(kept)], kept)
    assert set(records["week"].iloc[len(kept) :]) == {"2025-01-06"}
    pd.testing.assert_frame_equal(tf.assignment(), before)
    assert verify_trial(tf).problems == ()  # the record leaves the trial's fingerprints intact
    assert (tmp_path / "chart.png").read_bytes()[:4] == b"\x89PNG"
    lists = pd.read_csv(tmp_path / "lists.csv")
    assert set(lists["issue"]) <= {"under-served", "control visited"}
    assert (tmp_path / "map.png").read_bytes()[:4] == b"\x89PNG"


def test_monitor_map_draws_exactly_the_listed_places(trial_copy, pings_file):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import shapely

    from geoexp.maps import delivery_map_static

    path, crs = pings_file
    tf = TrialFile.open(trial_copy)
    units_frame = tf.units()
    weekly = stays_from_pings(path, UnitSet.from_frame(units_frame, None), x="x", y="y", crs=crs)
    week = delivery_week(tf.assignment(), weekly.dosage("week"), "2025-01-06", planned_minutes=30)
    assert len(week.under_served) and len(week.visited_controls)  # both lists have places
    ax = delivery_map_static(units_frame, week)
    drawn = ax.collections[1:]  # the first is the grey street grid
    vertices = {tuple(p) for c in drawn for seg in c.get_segments() for p in np.round(seg, 6)}
    listed = list(week.under_served.index) + list(week.visited_controls.index)
    # [L] shapely's coordinates of the listed units: the map draws their vertices and no others
    expected = shapely.get_coordinates(units_frame.geometry.loc[listed].to_numpy())
    assert vertices == {tuple(p) for p in np.round(expected, 6)}
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert f"treated, under-served ({len(week.under_served)})" in labels
    n_visited = sum(int(t.rsplit("(", 1)[1].rstrip(")")) for t in labels if "visited" in t)
    assert n_visited == len(week.visited_controls)
    plt.close(ax.figure)


def test_presence_command_writes_minutes_per_unit_and_week(trial_copy, pings_file, tmp_path):
    path, crs = pings_file
    out = tmp_path / "presence.csv"
    result = CliRunner().invoke(
        app,
        [
            "presence",
            str(trial_copy),
            "--pings",
            str(path),
            "--x",
            "x",
            "--y",
            "y",
            "--crs",
            crs,
            "--out",
            str(out),
        ],
    )
    assert result.exit_code == 0, result.output
    table = pd.read_csv(out)
    units = UnitSet.from_frame(TrialFile.open(trial_copy).units(), None)
    stays = stays_from_pings(path, units, x="x", y="y", crs=crs)
    assert table["minutes"].sum() == pytest.approx(stays.frame["minutes"].sum())
    assert table["visits"].sum() == len(stays)


def test_records_never_go_to_the_trial_own_layers(trial_copy):
    for layer in ("assignment", "units", "trial_meta", "outcomes", "superseded_outcomes"):
        with pytest.raises(InputError, match="belongs to the trial"):
            append_record(trial_copy, layer, pd.DataFrame({"a": [1]}))


def test_presence_command_needs_exactly_one_source(trial_copy, tmp_path):
    result = CliRunner().invoke(
        app, ["presence", str(trial_copy), "--out", str(tmp_path / "o.csv")]
    )
    assert result.exit_code == 2
    assert "either --pings or --visits" in result.output


def test_received_command_prints_the_itt_and_the_complier_effect(demo, pings_file, tmp_path):
    # The demo trial has stored outcomes; presence from invented pings is unrelated to the
    # assignment here, so only the wiring is checked (the numbers are checked against
    # statsmodels in tests/test_delivery_complier.py).
    path, crs = pings_file
    trial = tmp_path / "t.gpkg"
    shutil.copy2(demo / "trial.gpkg", trial)
    section = tmp_path / "received.md"
    result = CliRunner().invoke(
        app,
        [
            "received",
            str(trial),
            "--pings",
            str(path),
            "--x",
            "x",
            "--y",
            "y",
            "--crs",
            crs,
            "--test-draws",
            "99",
            "--section",
            str(section),
            "--dose-chart",
            str(tmp_path / "d.png"),
        ],
    )
    assert result.exit_code == 0, result.output
    assert "complier effect" in result.output and "ITT on the outcome" in result.output
    text = section.read_text()
    assert text.startswith("## Effect of treatment received")
    assert "primary result" in text
    assert (tmp_path / "d.png").read_bytes()[:4] == b"\x89PNG"


@pytest.mark.parametrize("command", ["presence", "monitor", "received", "timeline"])
def test_delivery_commands_have_help(command):
    result = CliRunner().invoke(app, [command, "--help"])
    assert result.exit_code == 0
    assert "Usage" in result.output
    assert ("--pings" in result.output) == (command != "timeline")


def test_timeline_command_draws_the_chart_and_checks_the_pre_trend(trial_copy, tmp_path):
    from geoexp.sampleregion import load_sample_region

    frame = load_sample_region().incidents.to_crs(TrialFile.open(trial_copy).units().crs)
    table = pd.DataFrame(
        {"x": frame.geometry.x, "y": frame.geometry.y, "date": frame["date"].astype(str)}
    )
    table.to_csv(tmp_path / "inc.csv", index=False)
    crs = frame.crs.to_string()
    result = CliRunner().invoke(
        app,
        [
            "timeline",
            str(trial_copy),
            "--incidents",
            str(tmp_path / "inc.csv"),
            "--x",
            "x",
            "--y",
            "y",
            "--crs",
            crs,
            "--window",
            "2025-01-01:2025-12-31",
            "--freq",
            "month",
            "--chart",
            str(tmp_path / "t.png"),
            "--out",
            str(tmp_path / "t.csv"),
        ],
    )
    assert result.exit_code == 0, result.output
    assert "Pre-trial trend" in result.output or "No pre-trend check" in result.output
    assert (tmp_path / "t.png").read_bytes()[:4] == b"\x89PNG"
    series = pd.read_csv(tmp_path / "t.csv", index_col=0)
    assert "treated" in series.columns
