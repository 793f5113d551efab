"""Effects per post period: per-period Hajek contrasts, their tests, intervals and Holm."""

from __future__ import annotations

import shutil
from types import SimpleNamespace

import matplotlib

matplotlib.use("Agg")

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from statsmodels.stats.multitest import multipletests

from geoexp.delivery import (
    MULTIPLICITY_NOTE,
    effects_by_period,
    holm,
    incidents_by_period,
    period_effects,
    plot_period_effects,
)
from geoexp.design import CompleteSampler
from geoexp.errors import InputError
from geoexp.exposure import ExposureMapping
from geoexp.graph import ExposureGraph
from geoexp.inference import ContrastSpec, constant_effect_test
from geoexp.trialfile import TrialFile
from geoexp.units import UnitSet


def no_interference_design(n: int, m: int, seed: int = 0):
    """Complete randomization of m of n units with no pairs within reach (no spillover)."""
    graph = ExposureGraph.from_pairs(np.arange(n), [], [], [], max_distance=10.0)
    mapping = ExposureMapping((5.0,))
    design = SimpleNamespace(
        sampler=CompleteSampler(n, None, m),
        graph=graph,
        mapping=mapping,
        eligible=np.ones(n, dtype=bool),
        stream=lambda *key: np.random.SeedSequence([seed, *[int(k) for k in key]]),
    )
    # Exact probabilities of complete randomization: treated m/n, pure control 1 - m/n.
    probabilities = np.zeros((n, mapping.n_conditions))
    probabilities[:, 0] = m / n
    probabilities[:, mapping.pure_control] = 1 - m / n
    return design, probabilities


def decaying_trial(rng, n=400, m=200, effects=(-3.0, -2.0, -1.0, 0.0)):
    """Poisson counts per unit and period; the treated effect decays linearly to zero."""
    z = np.zeros(n, dtype=bool)
    z[rng.choice(n, m, replace=False)] = True
    base = rng.gamma(4.0, 2.0, n)  # a unit's own level, the same in every period
    periods = pd.date_range("2025-03-03", periods=len(effects), freq="W-MON")
    y = np.column_stack([rng.poisson(base) + z * e for e in effects]).astype(float)
    return z, pd.DataFrame(y, columns=periods), base


def test_hajek_per_period_equals_weighted_least_squares():
    # [L] statsmodels WLS of the period's outcome on an intercept and the treated indicator,
    # weights 1/pi of the unit's own condition: the slope is the difference of the two
    # weighted (Hajek) means, an algebraic identity (e.g. Aronow & Samii 2017, the Hajek
    # estimator as weighted least squares).
    rng = np.random.default_rng(1)
    n, m = 150, 50
    design, probs = no_interference_design(n, m)
    # unequal probabilities within the contrast: make them vary by unit (still a valid input)
    probs = probs.copy()
    probs[:, 0] = rng.uniform(0.2, 0.5, n)
    probs[:, design.mapping.pure_control] = 1 - probs[:, 0]
    z, outcomes, _ = decaying_trial(rng, n=n, m=m)
    observed = np.where(z, 0, design.mapping.pure_control)
    result = period_effects(design, observed, probs, outcomes, n_draws=199, bands=False)
    pc = design.mapping.pure_control
    w = np.where(z, 1 / probs[:, 0], 1 / probs[:, pc])
    for j, row in enumerate(result.table.itertuples()):
        fit = sm.WLS(outcomes.iloc[:, j].to_numpy(), sm.add_constant(z.astype(float)), weights=w)
        assert row.estimate == pytest.approx(fit.fit().params[1], rel=1e-10)


def test_a_linear_decay_is_recovered_period_by_period():
    # Planted effects -3, -2, -1, 0 incidents per unit per week. Each period's estimate is
    # unbiased under complete randomization (difference in means, Neyman 1923); with 200 units
    # per arm its standard error is about 0.3 here, so every estimate lies within 4 Neyman
    # standard errors of the truth, and the intervals (exact test inversion) cover it.
    rng = np.random.default_rng(2)
    design, probs = no_interference_design(400, 200)
    effects = (-3.0, -2.0, -1.0, 0.0)
    z, outcomes, _ = decaying_trial(rng, effects=effects)
    observed = np.where(z, 0, design.mapping.pure_control)
    result = period_effects(design, observed, probs, outcomes, n_draws=499)
    table = result.table
    assert list(table["contrast"].unique()) == ["treated vs pure control"]
    assert len(table) == 4 and (table["n_units"] == 400).all()
    for j, (row, truth) in enumerate(zip(table.itertuples(), effects, strict=True)):
        y = outcomes.iloc[:, j].to_numpy()
        se = np.sqrt(y[z].var(ddof=1) / 200 + y[~z].var(ddof=1) / 200)  # Neyman (1923)
        assert abs(row.estimate - truth) < 4 * se
        assert row.ci_low <= truth <= row.ci_high
    # the estimates fall with the planted effect: OLS slope over periods near +1 per week
    slope = np.polyfit(np.arange(4.0), table["estimate"].to_numpy(), 1)[0]
    assert abs(slope - 1.0) < 0.5
    # a strong early effect is found even after Holm's adjustment
    assert table["p_holm"].iloc[0] <= 0.05


def test_the_mean_over_trials_recovers_the_decay_within_monte_carlo_error():
    # [A] Under complete randomization the difference in means is unbiased for each period's
    # effect (Neyman 1923): over 40 independent trials with a linear decay -3, -2, -1, 0 the
    # mean estimate of each period lies within 3.5 Monte Carlo standard errors of the truth.
    effects = (-3.0, -2.0, -1.0, 0.0)
    design, probs = no_interference_design(200, 100)
    rng = np.random.default_rng(6)
    estimates = []
    for _ in range(40):
        z, outcomes, _ = decaying_trial(rng, n=200, m=100, effects=effects)
        observed = np.where(z, 0, design.mapping.pure_control)
        result = period_effects(design, observed, probs, outcomes, n_draws=19)
        estimates.append(result.table["estimate"].to_numpy())
    estimates = np.array(estimates)
    mc = estimates.std(axis=0, ddof=1) / np.sqrt(len(estimates))
    assert np.all(np.abs(estimates.mean(axis=0) - np.array(effects)) < 3.5 * mc)


def test_each_period_is_the_constant_effect_test_and_its_inversion():
    # The same test as the pooled analysis, with the same draws: identical p-values and
    # interval ends; the interval excludes 0 exactly when the test rejects (Rosenbaum 2002).
    rng = np.random.default_rng(3)
    design, probs = no_interference_design(120, 60)
    z, outcomes, _ = decaying_trial(rng, n=120, m=60, effects=(-2.0, 0.0))
    observed = np.where(z, 0, design.mapping.pure_control)
    result = period_effects(design, observed, probs, outcomes, n_draws=299)
    spec = ContrastSpec(0, design.mapping.pure_control, np.ones(120, dtype=bool))
    for j, row in enumerate(result.table.itertuples()):
        y = outcomes.iloc[:, j].to_numpy()
        plug = np.zeros(design.mapping.n_conditions)
        plug[0] = y[z].mean() - y[~z].mean()
        same = constant_effect_test(design, observed, y, probs, spec, plug, n_draws=299)
        assert row.p_value == same.test.p_value
        assert row.ci_low == pytest.approx(same.ci_low, abs=0.05)
        assert row.ci_high == pytest.approx(same.ci_high, abs=0.05)
        assert (row.ci_low > 0 or row.ci_high < 0) == (row.p_value <= 0.05)


def test_baseline_is_subtracted_before_the_contrast():
    rng = np.random.default_rng(4)
    design, probs = no_interference_design(100, 50)
    z, outcomes, base = decaying_trial(rng, n=100, m=50, effects=(-1.0,))
    observed = np.where(z, 0, design.mapping.pure_control)
    plain = period_effects(design, observed, probs, outcomes, n_draws=99)
    changed = period_effects(design, observed, probs, outcomes, baseline=base, n_draws=99)
    y = outcomes.iloc[:, 0].to_numpy() - base
    # [A] the Hajek contrast of y - b under equal probabilities is the difference in means
    assert changed.table["estimate"].iloc[0] == pytest.approx(y[z].mean() - y[~z].mean())
    assert plain.outcome == "count" and "change" in changed.outcome


@pytest.mark.parametrize("seed", range(5))
def test_holm_matches_statsmodels(seed):
    # [L] statsmodels multipletests(method="holm") (Holm 1979 step-down adjustment).
    p = np.random.default_rng(seed).uniform(0, 0.2, 12)
    p[3] = np.nan
    ours = holm(p)
    ok = np.isfinite(p)
    expected = multipletests(p[ok], method="holm")[1]
    np.testing.assert_allclose(ours[ok], expected)
    assert np.isnan(ours[3])


def test_plot_has_one_interval_per_period_and_states_the_multiplicity():
    rng = np.random.default_rng(5)
    design, probs = no_interference_design(80, 40)
    z, outcomes, _ = decaying_trial(rng, n=80, m=40)
    observed = np.where(z, 0, design.mapping.pure_control)
    result = period_effects(design, observed, probs, outcomes, n_draws=99)
    ax = plot_period_effects(result)
    (container,) = ax.containers
    assert len(container.lines[0].get_xdata()) == 4  # one point per period
    assert "unadjusted" in ax.get_title() and "Holm" in ax.get_title()
    assert "Holm" in str(result) and MULTIPLICITY_NOTE in str(result)


def test_bad_inputs_are_refused():
    design, probs = no_interference_design(20, 10)
    observed = np.where(np.arange(20) < 10, 0, design.mapping.pure_control)
    with pytest.raises(InputError, match="one row per unit"):
        period_effects(design, observed, probs, pd.DataFrame(np.zeros((5, 2))))
    with pytest.raises(InputError, match="no post period"):
        period_effects(design, observed, probs, pd.DataFrame(index=range(20)))


def test_trial_file_effects_by_period_on_the_demo(demo, tmp_path):
    from geoexp.sampleregion import load_sample_region

    path = tmp_path / "trial.gpkg"
    shutil.copy2(demo / "trial.gpkg", path)
    tf = TrialFile.open(path)
    units = UnitSet.from_frame(tf.units(), None)
    frame = load_sample_region().incidents.to_crs(units.crs)
    table = pd.DataFrame(
        {"x": frame.geometry.x, "y": frame.geometry.y, "date": frame["date"].astype(str)}
    )
    counts = incidents_by_period(
        units, table, x="x", y="y", crs=units.crs, freq="month", tolerance_m=30
    )
    window = ("2025-07-01", "2025-12-31")
    result = effects_by_period(path, counts, window, n_draws=99)
    assert result.table["contrast"].iloc[0].startswith("treated")  # the treated rows first
    months = result.table["period"].unique()
    assert len(months) == 6 and pd.Timestamp(months.min()) == pd.Timestamp("2025-07-01")
    assert (result.table["ci_low"] <= result.table["estimate"]).all()
    assert (result.table["estimate"] <= result.table["ci_high"]).all()
    assert (result.table["p_holm"] >= result.table["p_value"]).all()
    with pytest.raises(InputError, match="before the trial window"):
        effects_by_period(path, counts, ("2020-01-01", "2025-12-31"), n_draws=9)


def test_timeline_command_writes_the_effects_per_period(demo, tmp_path):
    from typer.testing import CliRunner

    from geoexp.cli import app
    from geoexp.sampleregion import load_sample_region

    path = tmp_path / "trial.gpkg"
    shutil.copy2(demo / "trial.gpkg", path)
    frame = load_sample_region().incidents.to_crs(TrialFile.open(path).units().crs)
    table = pd.DataFrame(
        {"x": frame.geometry.x, "y": frame.geometry.y, "date": frame["date"].astype(str)}
    )
    table.to_csv(tmp_path / "inc.csv", index=False)
    args = ["timeline", str(path), "--incidents", str(tmp_path / "inc.csv")]
    args += ["--x", "x", "--y", "y", "--crs", frame.crs.to_string(), "--freq", "month"]
    args += ["--window", "2025-07-01:2025-12-31", "--chart", str(tmp_path / "t.png")]
    args += ["--effects", str(tmp_path / "e.png"), "--effects-out", str(tmp_path / "e.csv")]
    result = CliRunner().invoke(app, [*args, "--test-draws", "49"])
    assert result.exit_code == 0, result.output
    assert "Holm" in result.output and "primary result" in result.output
    assert (tmp_path / "e.png").read_bytes()[:4] == b"\x89PNG"
    effects = pd.read_csv(tmp_path / "e.csv")
    assert {"estimate", "ci_low", "ci_high", "p_value", "p_holm"} <= set(effects.columns)
    assert effects["period"].nunique() == 6
