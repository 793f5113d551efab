"""The complier effect: Wald ratio, its randomization test and its test-inversion interval."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from statsmodels.sandbox.regression.gmm import IV2SLS

from geoexp.delivery import complier_effect
from geoexp.design import CompleteSampler
from geoexp.exposure import ExposureMapping
from geoexp.graph import ExposureGraph
from geoexp.inference import ContrastSpec, fisher_test


def no_interference_design(n: int, m: int, seed: int = 0):
    """Complete randomization of m of n units with no pairs within reach (no spillover)."""
    graph = ExposureGraph.from_pairs(np.arange(n), [], [], [], max_distance=10.0)
    mapping = ExposureMapping((5.0,))
    design = SimpleNamespace(
        sampler=CompleteSampler(n, None, m),
        graph=graph,
        mapping=mapping,
        stream=lambda *key: np.random.SeedSequence([seed, *[int(k) for k in key]]),
    )
    # Exact probabilities of complete randomization: treated m/n, pure control 1 - m/n.
    probabilities = np.zeros((n, mapping.n_conditions))
    probabilities[:, 0] = m / n
    probabilities[:, mapping.pure_control] = 1 - m / n
    return design, probabilities


def generated_trial(rng, n=200, m=100, beta=-2.0, comply=0.7, contaminate=0.15):
    """Imperfect compliance: compliers take the dose when assigned, always-takers always."""
    z = np.zeros(n, dtype=bool)
    z[rng.choice(n, m, replace=False)] = True
    kind = rng.choice(3, n, p=[comply, contaminate, 1 - comply - contaminate])
    dose = np.where(kind == 0, z, kind == 1).astype(float)  # 0 complier, 1 always, 2 never
    y0 = rng.poisson(6.0, n).astype(float)
    return z, dose, y0 + beta * dose


def observed_conditions(z, mapping):
    return np.where(z, 0, mapping.pure_control)


def test_wald_ratio_equals_two_stage_least_squares():
    # [L] statsmodels IV2SLS (two-stage least squares with a constant, the assignment as the
    # instrument): with one binary instrument the 2SLS slope equals the Wald ratio of the
    # differences in means (Angrist, Imbens & Rubin 1996, eq. 8; an algebraic identity).
    rng = np.random.default_rng(4)
    design, probs = no_interference_design(200, 100)
    z, dose, y = generated_trial(rng)
    result = complier_effect(
        design, observed_conditions(z, design.mapping), y, dose, probs, n_draws=500
    )
    exog = np.column_stack([np.ones_like(y), dose])
    instrument = np.column_stack([np.ones_like(y), z.astype(float)])
    slope = IV2SLS(y, exog, instrument).fit().params[1]
    assert result.estimate == pytest.approx(slope, rel=1e-10)
    assert result.itt_dose == pytest.approx(dose[z].mean() - dose[~z].mean(), rel=1e-12)
    assert result.itt_outcome == pytest.approx(y[z].mean() - y[~z].mean(), rel=1e-12)
    assert result.ci_low <= result.estimate <= result.ci_high


def test_test_of_no_complier_effect_is_the_randomization_test_of_the_itt():
    # The same statistic and the same draws (the Fisher test's stream): the same p-value.
    rng = np.random.default_rng(5)
    design, probs = no_interference_design(120, 40)
    z, dose, y = generated_trial(rng, n=120, m=40, beta=-1.0)
    observed = observed_conditions(z, design.mapping)
    result = complier_effect(design, observed, y, dose, probs, n_draws=400)
    contrast = ContrastSpec(0, design.mapping.pure_control, np.ones(120, dtype=bool))
    fisher = fisher_test(design, observed, y, probs, contrast, n_draws=400)
    assert result.p_value == pytest.approx(fisher.p_value)
    # The interval excludes 0 exactly when that test rejects (test inversion, Rosenbaum 2002).
    assert (result.ci_low > 0 or result.ci_high < 0) == (result.p_value <= 0.05)


def test_a_weak_instrument_gives_an_unbounded_interval():
    # Assignment does not move the dose at all: every beta fits the data equally (Imbens &
    # Rosenbaum 2005): the set is the whole line, never a finite Wald interval.
    rng = np.random.default_rng(6)
    design, probs = no_interference_design(100, 50)
    z = np.zeros(100, dtype=bool)
    z[rng.choice(100, 50, replace=False)] = True
    dose = rng.random(100) < 0.5  # unrelated to z
    dose[:2] = [True, False]
    y = rng.poisson(5.0, 100).astype(float)
    result = complier_effect(
        design, observed_conditions(z, design.mapping), y, dose.astype(float), probs, n_draws=300
    )
    assert not result.bounded
    assert not (np.isfinite(result.ci_low) and np.isfinite(result.ci_high))


@pytest.mark.slow
def test_interval_covers_the_complier_effect_at_its_level():
    # Calibration: 300 generated trials with 70% compliers and 15% always-takers, a constant
    # effect of -2 incidents per unit of dose. The test-inversion interval is exact under this
    # model (Imbens & Rosenbaum 2005), so coverage should be at least 95% up to Monte Carlo
    # error: we require >= 93% and >= 0.95 - 3 Monte Carlo standard errors.
    rng = np.random.default_rng(11)
    design, probs = no_interference_design(120, 60)
    reps, hits = 300, 0
    for r in range(reps):
        z, dose, y = generated_trial(rng, n=120, m=60)
        result = complier_effect(
            design, observed_conditions(z, design.mapping), y, dose, probs, n_draws=199, rng=r
        )
        hits += result.ci_low <= -2.0 <= result.ci_high
    coverage = hits / reps
    se = np.sqrt(0.95 * 0.05 / reps)
    assert coverage >= max(0.93, 0.95 - 3 * se), coverage
