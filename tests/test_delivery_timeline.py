"""Results over time: incidents per unit and period, by condition, and the pre-trend check."""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from geoexp.delivery import condition_series, incidents_by_period, plot_over_time, pre_trend
from geoexp.errors import InputError
from geoexp.sampleregion import synthetic_grid
from geoexp.units import UnitSet

CRS = "EPSG:32727"


@pytest.fixture(scope="module")
def units():
    return UnitSet.from_frame(synthetic_grid(200, jitter=4.0, seed=2), "unit_id")


def planted_incidents(units, n=3000, seed=0):
    """Incidents one metre off the middle of known units on known days."""
    rng = np.random.default_rng(seed)
    which = rng.integers(0, units.n, n)
    mid = units.geometry.iloc[which].interpolate(0.5, normalized=True)
    days = np.datetime64("2025-01-01") + rng.integers(0, 365, n)
    frame = pd.DataFrame(
        {"x": mid.x.to_numpy() + 1.0, "y": mid.y.to_numpy(), "date": days.astype(str)}
    )
    return frame, units.ids[which], days


@pytest.mark.parametrize(("freq", "pandas_freq"), [("week", "W-SUN"), ("month", "M")])
def test_counts_per_unit_and_period_match_pandas_periods(units, freq, pandas_freq):
    frame, true_unit, days = planted_incidents(units)
    counts = incidents_by_period(units, frame, x="x", y="y", crs=CRS, freq=freq)
    # Reference: pandas calendar periods (weeks ending on Sunday start on Monday; pandas docs).
    start = pd.PeriodIndex(pd.to_datetime(days), freq=pandas_freq).start_time
    expected = (
        pd.DataFrame({"unit": true_unit, "period": start.to_numpy().astype("datetime64[D]")})
        .groupby(["unit", "period"])
        .size()
        .rename("incidents")
        .reset_index()
    )
    got = counts.assign(period=counts["period"].to_numpy().astype("datetime64[D]"))
    pd.testing.assert_frame_equal(
        got.sort_values(["unit", "period"], ignore_index=True),
        expected.sort_values(["unit", "period"], ignore_index=True),
        check_dtype=False,
    )
    assert counts.attrs["dropped"] == 0


def test_condition_series_is_the_mean_per_unit_with_zeros(units):
    frame, true_unit, days = planted_incidents(units, seed=1)
    counts = incidents_by_period(units, frame, x="x", y="y", crs=CRS, freq="month")
    labels = np.where(np.arange(units.n) % 4 == 0, "treated", "pure_control")
    assignment = pd.DataFrame({"condition": labels}, index=units.ids)
    series = condition_series(counts, assignment)
    assert len(series) == 12  # every month of 2025, none missing
    march = pd.Timestamp("2025-03-01")
    in_march = pd.to_datetime(days).month == 3
    treated_ids = set(units.ids[labels == "treated"])
    n_treated_incidents = sum(1 for u in true_unit[in_march] if u in treated_ids)
    assert series.loc[march, "treated"] == pytest.approx(n_treated_incidents / len(treated_ids))


def test_pre_trend_matches_ordinary_least_squares():
    # [L] statsmodels OLS of the difference on an intercept and the period number: the same
    # slope and standard error.
    rng = np.random.default_rng(3)
    index = pd.date_range("2024-01-01", periods=30, freq="MS")
    series = pd.DataFrame(
        {
            "treated": 2 + 0.05 * np.arange(30) + rng.normal(0, 0.1, 30),
            "pure_control": 2 + rng.normal(0, 0.1, 30),
        },
        index=index,
    )
    result = pre_trend(series, "2025-07-01")
    d = (series["treated"] - series["pure_control"]).iloc[:18].to_numpy()
    fit = sm.OLS(d, sm.add_constant(np.arange(18.0))).fit()
    assert result.n_periods == 18
    assert result.slope_difference == pytest.approx(fit.params[1])
    assert result.std_error == pytest.approx(fit.bse[1])
    assert result.p_value == pytest.approx(fit.pvalues[1])
    assert result.p_value < 0.01  # the planted drift is found
    with pytest.raises(InputError, match="at least 3 periods"):
        pre_trend(series, "2024-02-15")


def test_plot_shades_the_trial_window():
    index = pd.date_range("2025-01-06", periods=20, freq="W-MON")
    series = pd.DataFrame({"treated": np.ones(20), "pure_control": np.ones(20)}, index=index)
    ax = plot_over_time(series, ("2025-03-01", "2025-04-01"))
    assert len(ax.patches) == 1 and len(ax.lines) == 2


def test_unreadable_dates_are_named(units):
    frame = pd.DataFrame({"x": [0.0, 0.0], "y": [0.0, 0.0], "date": ["2025-01-01", "01/02/2025"]})
    with pytest.raises(InputError, match=r"'date'.*rows 1"):
        incidents_by_period(units, frame, x="x", y="y", crs=CRS)


def test_dose_groups_partition_the_places():
    from geoexp.delivery import dose_response_table

    rng = np.random.default_rng(0)
    minutes = np.where(rng.random(300) < 0.3, 0.0, rng.exponential(40, 300))
    y = rng.poisson(3, 300).astype(float)
    condition = np.where(np.arange(300) < 100, "treated", "pure_control")
    table = dose_response_table(minutes, y, condition, bins=4)
    assert table["places"].sum() == 300
    # Group 0 is exactly the places without presence; its mean outcome is theirs.
    none = table[table["group"] == 0].set_index("condition")
    for c in ("treated", "pure_control"):
        mask = (condition == c) & (minutes == 0)
        assert none.loc[c, "places"] == mask.sum()
        assert none.loc[c, "mean_outcome"] == pytest.approx(y[mask].mean())
    # Overall mean outcome is kept: the place-weighted group means average back to it.
    assert (table["places"] * table["mean_outcome"]).sum() / 300 == pytest.approx(y.mean())
