"""The demo job end to end: the report's "Over time" section and the delivery outputs."""

from __future__ import annotations

import shutil

import numpy as np
import pandas as pd
import pyogrio
import pytest
from PIL import Image

from geoexp.delivery import MULTIPLICITY_NOTE, RECORD_LAYER
from geoexp.quickstart import DEMO_MONITOR_WEEK, DEMO_PINGS, DEMO_PLANNED_MINUTES
from geoexp.report import OVER_TIME_TITLE
from geoexp.trialfile import TrialFile
from geoexp.workflow import analyse_trial


def test_report_shows_the_trial_over_time(demo_outputs):
    html = demo_outputs["report"].read_text(encoding="utf-8")
    md = demo_outputs["report_md"].read_text(encoding="utf-8")
    assert f"<h2>{OVER_TIME_TITLE}</h2>" in html
    assert f"## {OVER_TIME_TITLE}\n" in md
    section = md.split(f"## {OVER_TIME_TITLE}\n", 1)[1].split("\n## ", 1)[0]
    # the pre-trend sentence, the multiplicity note and the pooled effect named as primary
    primary = "(Estimates, above) is the trial's primary result"
    for text in ("Pre-trial trend, treated minus pure control", MULTIPLICITY_NOTE, primary):
        assert text in section
        assert text.split(";")[0].replace("'", "&#39;") in html
    # one row per month of the 2026 trial window for the treated contrast
    rows = [line for line in section.splitlines() if "| treated vs pure control |" in line]
    months = [line.split(" | ")[0].lstrip("| ") for line in rows]
    assert months == [f"2026-{m:02d}-01" for m in range(1, 13)]
    # the section's two figures are real images beside the Markdown
    for name in ("report_over_time.png", "report_period_effects.png"):
        assert f"({name})" in section
        with Image.open(demo_outputs["dir"] / name) as image:
            assert image.size[0] > 300 and image.size[1] > 150
    # the sections that were there before are all still there, in the same order
    heads = [line for line in md.splitlines() if line.startswith("## ")]
    assert heads.index(f"## {OVER_TIME_TITLE}") > heads.index("## Estimates")
    assert heads[-2:] == ["## What was excluded and why", "## Methods"]


def test_report_without_dated_incidents_says_why_the_section_is_left_out(tmp_path, demo_outputs):
    trial = tmp_path / "trial.gpkg"
    shutil.copy(demo_outputs["trial"], trial)
    run = analyse_trial(trial, report=tmp_path / "report.html", n_draws=50, tiles=None)
    md = run.report_md.read_text(encoding="utf-8")
    assert f"## {OVER_TIME_TITLE}" not in md
    excluded = md.split("## What was excluded and why", 1)[1]
    assert "No section 'Over time': the analysis was given no dated incidents" in excluded


def test_demo_pings_and_weekly_monitor(demo_outputs):
    pings = pd.read_parquet(demo_outputs["pings"])
    assert len(pings) == DEMO_PINGS
    assert list(pings.columns) == ["device", "time", "x", "y"]
    assert pings["time"].min() >= pd.Timestamp("2026-01-01")  # within the trial year
    # the monitor's dated record is in the trial file, one row per exposure condition
    tf = TrialFile.open(demo_outputs["trial"])
    record = pyogrio.read_dataframe(tf.path, layer=RECORD_LAYER)
    assignment = tf.assignment()
    assert set(record["week"]) == {DEMO_MONITOR_WEEK}
    assert sorted(record["condition"]) == sorted(assignment["condition"].unique())
    assert record["places"].sum() == len(assignment)
    for share in ("at_dose_share", "any_presence_share"):
        assert record[share].between(0, 1).all()
    assert (record["recorded_at"].str.len() > 0).all()
    # imperfect delivery: treated places get more presence than controls, but controls get some
    by = record.set_index("condition")
    controls = by.drop(index="treated")
    assert (by.loc["treated", "mean_minutes"] > controls["mean_minutes"]).all()
    assert (controls["any_presence_share"] > 0).any()
    # the lists agree with the planned dose
    lists = pd.read_csv(demo_outputs["delivery_lists"])
    under = lists[lists["issue"] == "under-served"]
    visited = lists[lists["issue"] == "control visited"]
    assert (under["minutes"] < DEMO_PLANNED_MINUTES).all()
    assert (under["condition"] == "treated").all()
    assert (visited["minutes"] > 0).all() and (visited["condition"] != "treated").all()
    assert len(under) == by.loc["treated", "under_served"]
    week = demo_outputs["delivery_week"].read_text(encoding="utf-8")
    assert f"week of {DEMO_MONITOR_WEEK}" in week
    for name in ("delivery_chart", "delivery_map"):
        with Image.open(demo_outputs[name]) as image:
            assert image.size[0] > 300


def test_demo_complier_effect_is_finite_with_an_interval_around_it(demo_outputs):
    row = pd.read_csv(demo_outputs["received_csv"]).iloc[0]
    values = row[["estimate", "ci_low", "ci_high", "itt_outcome", "itt_dose"]].astype(float)
    assert np.isfinite(values).all()
    assert row["ci_low"] <= row["estimate"] <= row["ci_high"]
    assert bool(row["bounded"])
    # Wald ratio: complier effect = ITT on the outcome / ITT on the dose (Angrist, Imbens &
    # Rubin 1996)
    assert row["estimate"] == pytest.approx(row["itt_outcome"] / row["itt_dose"], rel=1e-9)
    assert row["itt_dose"] > 0  # assignment raised the presence delivered
    # the ITT beside the complier effect is the analysis's own direct-effect estimate: the same
    # units (positivity floor included), outcome and Hajek weights
    results = pyogrio.read_dataframe(demo_outputs["trial"], layer="results")
    direct = results[results["contrast"] == "treated vs pure control"].iloc[0]
    assert row["itt_outcome"] == pytest.approx(float(direct["estimate"]), rel=1e-9)
    assert f"{int(direct['n_units']):,} eligible" in str(row["units_words"])
    md = demo_outputs["received"].read_text(encoding="utf-8")
    assert "complier effect" in md and "primary result" in md
