"""Results over time: incidents per unit per week or month, by exposure condition.

:func:`incidents_by_period` snaps incident points to units (the same exact
snapping as pings) and counts them per unit and ISO week or calendar month.
:func:`condition_series` turns the counts into the mean incidents per unit of
each exposure condition in each period (units without incidents count as
zero). :func:`pre_trend` compares the linear trends of two conditions before
the trial starts: a clear difference warns that the conditions were already
drifting apart, which a pre/post comparison would mistake for an effect.
:func:`plot_over_time` draws the series with the trial window shaded.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from typing import Literal

import numpy as np
import pandas as pd
import pyproj

from geoexp.delivery._from_pings import unit_index
from geoexp.delivery._snap import snap_points
from geoexp.errors import InputError, describe_rows

Period = Literal["week", "month"]


def _period_start(days: np.ndarray, freq: Period) -> np.ndarray:
    if freq == "week":
        n = days.astype(np.int64)
        return (n - (n + 3) % 7).astype("datetime64[D]")  # 1970-01-01 was a Thursday
    if freq == "month":
        return days.astype("datetime64[M]").astype("datetime64[D]")
    raise InputError(f"freq must be 'week' or 'month', got {freq!r}")


def incidents_by_period(
    units,
    incidents: str | os.PathLike | pd.DataFrame,
    *,
    date_column: str = "date",
    x: str | None = None,
    y: str | None = None,
    lon: str | None = None,
    lat: str | None = None,
    crs: object = None,
    freq: Period = "week",
    tolerance_m: float = 30.0,
) -> pd.DataFrame:
    """Incidents per unit and period (ISO week from Monday, or calendar month).

    Dates are ISO 8601 (a time after the date is ignored); an unreadable date
    is an error naming the rows. Incidents with no position or no unit within
    the tolerance are left out and their number is kept in ``attrs["dropped"]``.

    Parameters
    ----------
    units : geoexp.units.UnitSet
        The trial's units.
    incidents : path or DataFrame
        CSV file or frame, one row per incident.
    date_column : str
        Column of the incident's date (ISO 8601).
    x, y : str, optional
        Columns of the incident's easting and northing in ``crs``.
    lon, lat : str, optional
        Columns of the incident's longitude and latitude in decimal degrees
        (WGS 84, EPSG:4326), used instead of ``x``/``y``.
    crs : optional
        CRS of ``x``/``y``: anything pyproj accepts.
    freq : {"week", "month"}
        Period: ISO week starting on Monday, or calendar month.
    tolerance_m : float
        Largest distance in metres from an incident to its unit.

    Returns
    -------
    pandas.DataFrame
        Columns ``unit``, ``period`` (first day), ``incidents``; only non-zero rows.
    """
    if isinstance(incidents, pd.DataFrame):
        frame, source, word, first = incidents, "<DataFrame>", "row", 0
    else:
        path = os.fspath(incidents)
        if not os.path.exists(path):
            raise InputError(f"the incidents file '{path}' does not exist")
        frame, source, word, first = pd.read_csv(path, dtype=str), path, "line", 2
    named = [c for c in (date_column, x, y, lon, lat) if c]
    missing = [c for c in named if c not in frame.columns]
    if missing:
        raise InputError(f"the incidents '{source}' have no column {', '.join(map(repr, missing))}")
    if x is not None and y is not None:
        if crs is None:
            raise InputError(f"the incidents '{source}' give x/y but no CRS: pass crs=")
        src, cx, cy = pyproj.CRS.from_user_input(crs), x, y
    elif lon is not None and lat is not None:
        src, cx, cy = pyproj.CRS(4326), lon, lat
    else:
        raise InputError("give the incident positions as x=/y= (with crs=) or lon=/lat=")
    text = frame[date_column].astype("string").str.strip().str.slice(0, 10)
    days = pd.to_datetime(text, format="%Y-%m-%d", errors="coerce")
    bad = np.flatnonzero(days.isna().to_numpy())
    if len(bad):
        rows = describe_rows((bad + first).tolist())
        raise InputError(
            f"column {date_column!r} of the incidents '{source}' has dates that cannot be read at "
            f"{word}s {rows}; write them as ISO dates such as 2025-03-05"
        )
    px = pd.to_numeric(frame[cx], errors="coerce").to_numpy(dtype=float)
    py = pd.to_numeric(frame[cy], errors="coerce").to_numpy(dtype=float)
    px, py = pyproj.Transformer.from_crs(src, units.crs, always_xy=True).transform(px, py)
    unit, _ = snap_points(
        unit_index(units),
        np.asarray(px, float),
        np.asarray(py, float),
        tolerance_m / units.metres_per_unit,
    )
    kept = unit >= 0
    period = _period_start(days.to_numpy().astype("datetime64[D]"), freq)
    table = (
        pd.DataFrame({"unit": units.ids[unit[kept]], "period": period[kept]})
        .groupby(["unit", "period"])
        .size()
        .rename("incidents")
        .reset_index()
    )
    table.attrs["dropped"] = int((~kept).sum())
    table.attrs["freq"] = freq
    return table


def condition_series(counts: pd.DataFrame, assignment: pd.DataFrame) -> pd.DataFrame:
    """Mean incidents per unit of each exposure condition in each period (periods x conditions).

    Every unit of ``assignment`` counts, zeros included; periods run from the
    first to the last period seen in ``counts`` without gaps.

    Parameters
    ----------
    counts : pandas.DataFrame
        The output of :func:`incidents_by_period` (its ``attrs["freq"]`` gives
        the period).
    assignment : pandas.DataFrame
        Indexed by unit id, with a ``condition`` column.

    Returns
    -------
    pandas.DataFrame
        Indexed by ``period`` (first day), one column per condition: mean
        incidents per unit per period.
    """
    if "condition" not in assignment.columns:
        raise InputError("the assignment has no 'condition' column")
    freq = counts.attrs.get("freq", "week")
    condition = assignment["condition"].astype(str)
    sizes = condition.value_counts()
    hit = counts.assign(condition=condition.reindex(counts["unit"]).to_numpy())
    hit = hit[hit["condition"].notna()]
    totals = hit.pivot_table(
        index="period", columns="condition", values="incidents", aggfunc="sum", fill_value=0
    )
    if len(totals):
        lo, hi = totals.index.min(), totals.index.max()
        step = "W-MON" if freq == "week" else "MS"
        totals = totals.reindex(pd.date_range(lo, hi, freq=step), fill_value=0)
    totals = totals.reindex(columns=sizes.index, fill_value=0)
    series = totals / sizes
    series.index.name = "period"
    return series


@dataclass(frozen=True)
class PreTrend:
    """Difference in linear pre-trial trends of two conditions (incidents per unit per period)."""

    slope_difference: float
    std_error: float
    p_value: float
    n_periods: int
    first: str
    second: str

    def __str__(self) -> str:
        return (
            f"Pre-trial trend, {self.first} minus {self.second}: "
            f"{self.slope_difference:+.4f} incidents per unit per period per period "
            f"(standard error {self.std_error:.4f}, p = {self.p_value:.3f}, "
            f"{self.n_periods} periods); a small p-value warns the conditions were already "
            "drifting apart before the trial"
        )


def pre_trend(
    series: pd.DataFrame, trial_start: str, *, first: str = "treated", second: str = "pure_control"
) -> PreTrend:
    """Ordinary least squares slope of the difference of two series over the pre-trial periods.

    The difference ``first - second`` is regressed on the period number with
    an intercept; the usual OLS standard error and a two-sided t test with
    ``n - 2`` degrees of freedom are given (serial correlation would make the
    standard error too small: read the p-value as a warning, not a proof).

    Parameters
    ----------
    series : pandas.DataFrame
        The output of :func:`condition_series` (periods x conditions).
    trial_start : str
        First day of the trial (ISO date); the periods before it are used.
    first, second : str
        The two conditions compared.

    Returns
    -------
    PreTrend
        Slope of the difference in incidents per unit per period, per period,
        with its standard error and p-value.

    Raises
    ------
    geoexp.errors.InputError
        A condition missing from ``series``, or fewer than 3 pre-trial periods.
    """
    from scipy import stats

    for name in (first, second):
        if name not in series.columns:
            raise InputError(f"no condition {name!r} in the series; it has {list(series.columns)}")
    pre = series[series.index < pd.Timestamp(trial_start)]
    n = len(pre)
    if n < 3:
        raise InputError(f"a pre-trend needs at least 3 periods before {trial_start}, got {n}")
    d = (pre[first] - pre[second]).to_numpy(dtype=float)
    t = np.arange(n, dtype=float)
    fit = stats.linregress(t, d)
    return PreTrend(float(fit.slope), float(fit.stderr), float(fit.pvalue), n, first, second)


def plot_over_time(series: pd.DataFrame, window: tuple[str, str], ax=None):
    """Incidents per unit by condition over time, the trial window shaded.

    Parameters
    ----------
    series : pandas.DataFrame
        The output of :func:`condition_series` (periods x conditions).
    window : tuple of str
        First and last day of the trial (ISO dates), shaded grey.
    ax : matplotlib.axes.Axes, optional
        Axes to draw on; a new 7 x 3.5 inch figure by default.

    Returns
    -------
    matplotlib.axes.Axes
        The axes drawn on.
    """
    import matplotlib.pyplot as plt

    if ax is None:
        _, ax = plt.subplots(figsize=(7, 3.5))
    for condition in series.columns:
        ax.plot(series.index, series[condition], label=condition, linewidth=1.4)
    ax.axvspan(
        pd.Timestamp(window[0]),
        pd.Timestamp(window[1]),
        color="0.85",
        zorder=0,
        label="trial window",
    )
    ax.set_ylabel("incidents per unit per period")
    ax.set_xlabel("period starting")
    ax.set_title("Incidents by exposure condition over time")
    ax.legend(fontsize="small", frameon=False)
    ax.figure.autofmt_xdate()
    return ax
