"""The whole analysis of a trial, its report, and its refusal to analyse a tampered file."""

from __future__ import annotations

import dataclasses
import shutil

import numpy as np
import pandas as pd
import pyogrio
import pytest

from geoexp.analysis import _run as run_module
from geoexp.analysis import analyse
from geoexp.cautions import CAUTION
from geoexp.design import Design
from geoexp.errors import DesignError, InputError
from geoexp.report import write_report
from geoexp.trialfile import TrialFile, design_from_trial


@pytest.fixture(scope="module")
def analysis(demo_outputs):
    return analyse(demo_outputs["trial"], n_draws=300)


def test_demo_analysis_finds_the_planted_reduction(analysis):
    # The demo plants a 30% reduction on treated segments (DEMO_MULTIPLIERS); with 40 hot
    # spots the Fisher test must see it.
    direct = analysis.effects[0]
    assert direct.contrast == "treated vs pure control"
    assert direct.estimate < 0
    assert analysis.fisher[0].p_value < 0.05
    assert analysis.verdicts[0].finding == "reduction"
    assert len(analysis.effects) == 3  # treated and two spillover bands
    for e in analysis.effects:
        assert e.ci_low < e.estimate < e.ci_high
    for low, high in analysis.intervals:
        assert low < high


def test_hajek_estimate_is_the_weighted_difference_in_means(analysis, demo_outputs):
    # [A] the Hajek contrast is a difference of inverse-probability-weighted means
    units = analysis.per_unit
    y = units["change"].to_numpy()
    e = analysis.effects[1]
    p1, pc = units["p_spillover_1"].to_numpy(), units["p_pure_control"].to_numpy()
    # the row's units: never-eligible units whose probabilities of both reach the floor
    pop = (p1 >= analysis.floor) & (pc >= analysis.floor) & ~units["eligible"].to_numpy(bool)
    assert (pop == units["in_spillover_1"].to_numpy()).all()
    k = pop & (units["condition"] == "spillover_1").to_numpy()
    c = pop & (units["condition"] == "pure_control").to_numpy()
    expected = np.average(y[k], weights=1 / p1[k]) - np.average(y[c], weights=1 / pc[c])
    assert e.estimate == pytest.approx(expected, rel=1e-10)
    # [A] the displacement quotient's counts are the sums by observed condition
    d = analysis.displacement[0]
    assert d.target_after == units.loc[units["condition"] == "treated", "post"].sum()


def test_results_table_and_report(analysis, demo_outputs):
    frame = analysis.to_frame()
    assert list(frame.index) == [e.contrast for e in analysis.effects]
    assert {"estimate", "ci_low", "ci_high", "p_value", "p_value_no_spillover"} <= set(frame)
    html = demo_outputs["report"].read_text(encoding="utf-8")
    md = demo_outputs["report_md"].read_text(encoding="utf-8")
    for text in (html, md):
        assert "treated vs pure control" in text
        assert "Bowers" in text
    assert CAUTION.split(".")[0] in html
    assert "data:image/png;base64" in html
    tf = TrialFile.open(demo_outputs["trial"])
    stored = pyogrio.read_dataframe(tf.path, layer="results")
    assert len(stored) == 3
    assert tf.meta["results_spec_hash"] == tf.spec_hash


def test_other_outcome_and_estimator(demo_outputs):
    post = analyse(
        demo_outputs["trial"],
        outcome="post",
        estimator="horvitz-thompson",
        n_draws=100,
        intervals=False,
    )
    assert post.effects[0].estimator == "horvitz-thompson"
    assert "post-period" in post.outcome_words
    assert np.isnan(post.intervals[0][0])


def test_tampered_assignment_is_refused(tmp_path, demo_outputs):
    path = tmp_path / "trial.gpkg"
    shutil.copy(demo_outputs["trial"], path)
    tf = TrialFile.open(path)
    assign = tf.assignment()
    treated = assign.index[assign["treated"].astype(bool)][0]
    control = assign.index[~assign["treated"].astype(bool) & assign["eligible"].astype(bool)][0]
    assign.loc[treated, "treated"] = False
    assign.loc[control, "treated"] = True
    tf.write_layers({"assignment": assign})
    with pytest.raises(DesignError, match="edited by hand"):
        design_from_trial(path)


def test_missing_outcomes_are_named(tmp_path, demo_outputs):
    from geoexp.outcomes import OutcomeTable, load_outcomes

    table = load_outcomes(demo_outputs["trial"])
    partial = OutcomeTable(
        counts=table.counts.iloc[5:],
        pre=table.pre,
        post=table.post,
        tolerance_m=table.tolerance_m,
        drops=table.drops,
    )
    with pytest.raises(ValueError, match="no counts for 5 units"):
        analyse(demo_outputs["trial"], partial, n_draws=50)


def test_counts_in_trial_match_the_incidents(demo_outputs):
    # independent tally with geopandas sjoin_nearest on the same CSV and periods
    import geopandas as gpd

    tf = TrialFile.open(demo_outputs["trial"])
    units = tf.units()
    inc = pd.read_csv(demo_outputs["incidents"])
    pts = gpd.GeoDataFrame(inc, geometry=gpd.points_from_xy(inc.lon, inc.lat), crs=4326)
    pts = pts.to_crs(units.crs)
    post = pts[(pts["date"] >= "2026-01-01") & (pts["date"] <= "2026-12-31")]
    joined = gpd.sjoin_nearest(post, units[["geometry"]].reset_index(), max_distance=30.0)
    # equidistant units all come back from sjoin_nearest; geoexp's documented rule keeps the
    # smallest id, so apply the same rule here
    joined = joined.sort_values(["incident_id", tf.id_column]).drop_duplicates("incident_id")
    expected = joined.groupby(tf.id_column).size().reindex(units.index, fill_value=0)
    stored = tf.read("outcomes")["post"].reindex(units.index)
    np.testing.assert_array_equal(stored.to_numpy(), expected.to_numpy())


def test_saturation_design_is_analysed_by_level(tmp_path, region_path):
    # A randomized-saturation design over the districts: the analysis adds the group-mean
    # table of Baird et al. (2018), whose total equals direct + spillover exactly [A].
    from geoexp.design import DesignSpec
    from geoexp.outcomes import OutcomeTable, save_outcomes
    from geoexp.trialfile import write_trial

    spec = DesignSpec.from_dict(
        {
            "name": "saturation test",
            "seed": 3,
            "draws": 300,
            "units": {"path": str(region_path), "layer": "segments", "id_column": "segment_id"},
            "eligible": {"top_column": "incidents_y1", "top_k": 400},
            "assignment": {
                "method": "saturation",
                "cluster_column": "district",
                "saturations": [0.0, 0.2, 0.5],
                "cluster_counts": [2, 3, 3],
            },
            "exposure": {"bands_m": [150]},
        }
    )
    design = Design.from_spec(spec)
    assignment = design.draw()
    trial = write_trial(tmp_path / "sat.gpkg", design, assignment, design.probabilities(300))
    rng = np.random.default_rng(0)
    counts = pd.DataFrame(
        {"pre": rng.poisson(3, design.units.n), "post": rng.poisson(3, design.units.n)},
        index=design.units.ids,
    )
    outcomes = OutcomeTable.from_counts(
        counts,
        None,
        units=trial,
        pre=("2025-01-01", "2025-12-31"),
        post=("2026-01-01", "2026-12-31"),
    )
    save_outcomes(trial, outcomes)
    result = analyse(trial.path, n_draws=100, intervals=False)
    table = result.saturation
    assert table is not None and list(table.index) == [0.2, 0.5]
    np.testing.assert_allclose(table["total"], table["direct"] + table["spillover"])


def test_all_units_eligible_uses_random_focal_units(tmp_path):
    # Every unit eligible (no never-treated units): the spillover test conditions on the
    # assignment of randomly chosen focal units (exact for complete randomization).
    import geopandas as gpd

    from geoexp.design import DesignSpec
    from geoexp.outcomes import OutcomeTable, save_outcomes
    from geoexp.sampleregion import synthetic_grid
    from geoexp.trialfile import write_trial

    grid = synthetic_grid(900, kind="parcel", seed=2)
    grid.to_file(tmp_path / "parcels.gpkg", layer="parcels", engine="pyogrio")
    spec = DesignSpec.from_dict(
        {
            "name": "all eligible",
            "seed": 4,
            "draws": 300,
            "units": {"path": str(tmp_path / "parcels.gpkg"), "id_column": "unit_id"},
            "assignment": {"method": "complete", "treated": 60},
            "exposure": {"bands_m": [40.0]},
        }
    )
    design = Design.from_spec(spec)
    trial = write_trial(tmp_path / "t.gpkg", design, design.draw(), design.probabilities(300))
    rng = np.random.default_rng(1)
    counts = pd.DataFrame(
        {"pre": rng.poisson(2, 900), "post": rng.poisson(2, 900)}, index=design.units.ids
    )
    save_outcomes(
        trial,
        OutcomeTable.from_counts(
            counts,
            None,
            units=trial,
            pre=("2025-01-01", "2025-12-31"),
            post=("2026-01-01", "2026-12-31"),
        ),
    )
    result = analyse(trial.path, n_draws=200, intervals=False)
    test = result.spillover_tests[1]
    assert test is not None and test.n_focal >= 10
    assert any("focal units chosen at random" in n for n in result.notes)
    assert isinstance(gpd.read_file(tmp_path / "t.gpkg", layer="units"), gpd.GeoDataFrame)


def test_linked_pairs_path_runs_on_a_whole_trial(demo_outputs, monkeypatch):
    # Force the path big trials take (linked pairs only): same estimates, similar SEs.
    from geoexp.estimate import _horvitz

    dense = analyse(demo_outputs["trial"], n_draws=100, intervals=False)
    monkeypatch.setattr(_horvitz, "DENSE_LIMIT", 0)
    monkeypatch.setattr("geoexp.analysis._run.DENSE_LIMIT", 0)  # the note reads the public name
    linked = analyse(demo_outputs["trial"], n_draws=100, intervals=False)
    for a, b in zip(dense.effects, linked.effects, strict=True):
        assert a.estimate == b.estimate
        assert b.joint.startswith("linked pairs")
        assert 0.7 < b.std_error / a.std_error < 1.3
    assert any("linked" not in n and "hinge" in n for n in linked.notes)


def test_every_row_is_about_one_set_of_units_and_its_interval_agrees_with_its_test(analysis):
    # [A] test inversion (Rosenbaum 2002 [from memory]): the printed interval excludes 0
    # exactly when the row's test at 0 rejects; both are over the row's own units
    alpha = 1 - analysis.level
    assert len(analysis.rows) >= len(analysis.effects)
    for row in analysis.rows:
        add = row.additive
        # (a set of non-rejected effects that is not one interval is flagged, and its verdict
        # is "inconclusive")
        assert add.excludes_null == (add.test.p_value <= alpha) or (
            not add.connected and row.verdict.finding == "inconclusive"
        ), row.label
        assert row.effect.n_units == row.estimand.n_units
        assert row.estimand.floor == analysis.floor
        assert f"{row.estimand.n_units:,}" in row.verdict.sentence  # printed with separators
        if row.rate_ratio is not None and np.isfinite(row.rate_ratio.ci_low):
            assert row.rate_ratio.excludes_null == (row.rate_ratio.test.p_value <= alpha)
        assert "% of the pure-control mean" not in row.verdict.sentence
    # spillover rows: the exact test runs on the very units of the estimate
    for i, row in enumerate(analysis.rows[1 : len(analysis.effects)], start=1):
        assert row.estimand.group == "never-eligible"
        assert analysis.fisher[i] is None  # "no effect at all" is not a spillover test
        if row.exact is not None:
            assert row.exact.n_focal == row.estimand.n_units
    # outputs match rows by condition codes, not label text
    assert [r.exposure_code for r in analysis.rows[: len(analysis.effects)]] == [
        "treated",
        "spillover_1",
        "spillover_2",
    ]
    assert {r.reference_code for r in analysis.rows} == {"pure_control"}
    assert analysis.codes == ("treated", "spillover_1", "spillover_2")
    # the total net effect counts the treated area once (Bowers & Johnson 2003 parts)
    parts = analysis.displacement[0].target_part + sum(d.buffer_part for d in analysis.displacement)
    assert analysis.total_net_effect == pytest.approx(parts)
    for d in analysis.displacement:
        # the quotient with its spread over the design's assignments
        assert d.wdq_low < d.wdq_high
        if not (analysis.verdicts[0].finding == "reduction"):
            assert d.reading.startswith("not read")
    frame = analysis.rows_frame()
    assert {"units", "left_out", "rate_ratio", "ess_exposure", "finding"} <= set(frame)


def test_total_net_effect_printed_only_when_every_part_is_clear(analysis):
    from dataclasses import replace

    text = str(analysis)
    clear = all(d.direct_effect_clear and d.buffer_effect_clear for d in analysis.displacement)
    assert ("incidents prevented" in text) == clear
    assert ("Total net effect not given" in text) == (not clear)
    # With every part marked clear the sum is printed, labelled descriptive.
    marked = replace(
        analysis,
        displacement=tuple(
            replace(d, direct_effect_clear=True, buffer_effect_clear=True)
            for d in analysis.displacement
        ),
    )
    assert "Total net effect (descriptive, no interval" in str(marked)


def test_observed_bundle_derives_the_outcome():
    # Source: the definitions: the change is post minus pre; "post" is the post-period counts.
    from geoexp.analysis._observed import Observed

    pre, post = np.array([3.0, 0.0, 5.0]), np.array([1.0, 2.0, 5.0])
    conditions = np.array([0, 1, 2])
    change = Observed(pre, post, conditions, "change")
    np.testing.assert_array_equal(change.y, [-2.0, 2.0, 0.0])
    assert change.period == "pre-period and post-period"
    only_post = Observed(pre, post, conditions, "post")
    np.testing.assert_array_equal(only_post.y, post)
    assert only_post.words == "incidents in the post-period"
    with pytest.raises(ValueError, match="outcome must be 'change' or 'post'"):
        Observed(pre, post, conditions, "ratio")


def test_no_eligible_unit_above_the_floor_stops_with_the_reason(demo_outputs):
    # the demo treats 40 of 150 eligible segments kept apart, so no P(treated) reaches 0.45:
    # with that floor the direct effect has no units and the analysis must say so and what to
    # change, not fail on an empty mean
    with pytest.raises(InputError, match=r"floor 0\.45.*positivity_floor"):
        analyse(demo_outputs["trial"], n_draws=50, intervals=False, floor=0.45)


def test_a_band_with_no_unit_above_the_floor_gets_no_row_and_a_note(
    demo_outputs, monkeypatch, tmp_path
):
    real = run_module.contrast_units

    def band_2_below_the_floor(probs, eligible, k, *args, **kwargs):
        est = real(probs, eligible, k, *args, **kwargs)
        if k == 2:
            return dataclasses.replace(est, units=np.zeros_like(est.units))
        return est

    monkeypatch.setattr(run_module, "contrast_units", band_2_below_the_floor)
    result = analyse(demo_outputs["trial"], n_draws=50, intervals=False)
    assert [row.exposure_code for row in result.rows] == ["treated", "spillover_1"]
    assert any("spillover_2" in n or "no row" in n for n in result.notes)
    assert len(result.to_frame()) == 2
    out = tmp_path / "report.html"
    write_report(result, out, trial=TrialFile.open(demo_outputs["trial"]))
    assert "no row" in out.read_text(encoding="utf-8")
