"""Power curves: the same simulation as the power table, read off by linear interpolation."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from geoexp.design import Design, DesignSpec
from geoexp.errors import InputError
from geoexp.power import NegativeBinomialOutcome, PowerCurve, power_curve, simulate_power


@pytest.fixture(scope="module")
def small_design(demo):
    spec = DesignSpec.from_toml(demo / "design.toml").replace(draws=100)
    return Design.from_spec(spec)


def test_curve_points_are_the_power_table_runs(small_design):
    model = NegativeBinomialOutcome("incidents_y1", 0.5, {"treated": 0.6})
    curve = power_curve(
        small_design, model, rate_ratios=(0.6, 1.0), n_treated=(20,), n_sims=30, n_draws=40
    )
    assert set(curve.table["n_treated"]) == {20, 40}
    assert len(curve.table) == 4
    own = simulate_power(small_design, model, n_sims=30, n_draws=40)
    point = curve.table[(curve.table["n_treated"] == 40) & (curve.table["rate_ratio"] == 0.6)]
    # The design's own point is the very run the power table prints.
    assert point["power"].item() == own.contrasts[0].power
    assert point["mc_error"].item() == own.contrasts[0].mc_error
    # Monte Carlo error of a share: sqrt(p (1 - p) / n) (binomial variance, analytic).
    p = curve.table["power"].to_numpy()
    np.testing.assert_allclose(curve.table["mc_error"], np.sqrt(p * (1 - p) / 30))
    assert "40 treated" in str(curve) and "20 treated" in str(curve)


def test_reading_the_grid():
    # Power rising linearly by 0.2 per 0.1 of reduction: 0.8 is crossed at ratio 0.65 exactly
    # (linear interpolation between 0.7 -> 0.7 and 0.6 -> 0.9, analytic).
    table = pd.DataFrame(
        {
            "n_treated": [40] * 4 + [80] * 4,
            "rate_ratio": [0.6, 0.7, 0.8, 0.9] * 2,
            "power": [0.9, 0.7, 0.5, 0.3, 1.0, 0.9, 0.7, 0.4],
            "mc_error": [0.0] * 8,
        }
    )
    curve = PowerCurve("toy", table, 40, 0.05, 100, 100)
    assert curve.detectable_ratio(0.8) == pytest.approx(0.65)
    # At ratio 0.8 the power goes 0.5 (40 treated) to 0.7 (80): 0.6 is reached at 60 treated.
    assert curve.required_treated(0.8, 0.6) == pytest.approx(60.0)
    assert curve.required_treated(0.9, 0.8) is None  # never reached on the grid
    assert curve.detectable_ratio(0.95) is None
    with pytest.raises(InputError, match="grid"):
        curve.required_treated(0.75)


def test_bad_curve_arguments(small_design):
    model = NegativeBinomialOutcome("incidents_y1", 0.5, {"treated": 0.6})
    with pytest.raises(InputError, match="between 1 and"):
        power_curve(small_design, model, n_treated=(10_000,), n_sims=5, n_draws=5)
    with pytest.raises(InputError, match="positive"):
        power_curve(small_design, model, rate_ratios=(-1,), n_sims=5, n_draws=5)
