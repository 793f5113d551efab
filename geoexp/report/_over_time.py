"""The report's "Over time" section: incidents per unit by condition per period, pre-trend, effects.

:func:`over_time_section` gathers, from incidents counted per unit and week or
month (:func:`geoexp.delivery.incidents_by_period`), the series of mean
incidents per unit of each exposure condition with the trial window shaded,
the pre-trial trend check, and the treated (and band-1) effect in each post
period with its own randomization test, test-inversion interval and Holm
adjustment (Holm 1979). The pooled effect over the whole post-period stays the
trial's primary result; the section says so.
"""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd

from geoexp.errors import InputError

OVER_TIME_TITLE = "Over time"
PRIMARY_NOTE = (
    "The pooled effect over the whole post-period (Estimates, above) is the trial's primary "
    "result; this section shows its shape over time and is not a further test of it."
)


@dataclass(frozen=True, eq=False)
class OverTimeSection:
    """What the report's "Over time" section shows.

    Attributes
    ----------
    freq : str
        ``"week"`` or ``"month"``.
    window : tuple of str
        First and last day of the trial (ISO dates).
    series_png, effects_png : bytes
        The incidents-over-time figure (trial window shaded) and the
        per-period effects figure.
    pre_trend : str
        The pre-trend check's sentence (or why it could not be made).
    effects : pandas.DataFrame
        Per-period effects, rounded for display.
    notes : tuple of str
        The multiplicity note, the primary-result note and any other note.
    """

    freq: str
    window: tuple[str, str]
    series_png: bytes
    effects_png: bytes
    pre_trend: str
    effects: pd.DataFrame
    notes: tuple[str, ...]
    title: str = OVER_TIME_TITLE

    @property
    def intro(self) -> str:
        """One sentence on what the section shows."""
        return (
            f"Incidents counted per unit and {self.freq}, the trial window "
            f"{self.window[0]} to {self.window[1]} shaded."
        )


def over_time_section(
    trial,
    counts: pd.DataFrame,
    window: tuple[str, str],
    *,
    n_draws: int = 2000,
    level: float = 0.95,
) -> OverTimeSection:
    """Build the "Over time" section of a trial's report.

    Parameters
    ----------
    trial : geoexp.trialfile.TrialFile
        The trial file (its assignment and design).
    counts : pandas.DataFrame
        Incidents per unit and period, from
        :func:`geoexp.delivery.incidents_by_period` (``attrs["freq"]`` names
        the period).
    window : tuple of str
        First and last day of the trial (ISO dates).
    n_draws : int
        Draws of the design for each period's randomization test.
    level : float
        Confidence level of each period's interval.

    Returns
    -------
    OverTimeSection
    """
    from geoexp.delivery import (
        MULTIPLICITY_NOTE,
        condition_series,
        effects_by_period,
        plot_over_time,
        plot_period_effects,
        pre_trend,
    )
    from geoexp.report._context import _figure

    freq = str(counts.attrs.get("freq", "week"))
    series = condition_series(counts, trial.assignment())
    try:
        trend = str(pre_trend(series, window[0])).replace("pure_control", "pure control")
    except InputError as err:
        trend = f"No pre-trend check: {err}."
    # the legend in words: "spillover band 1", "pure control"
    shown_series = series.rename(
        columns=lambda c: str(c).replace("spillover_", "spillover band ").replace("_", " ")
    )
    effects = effects_by_period(trial, counts, window, n_draws=n_draws, level=level)
    table = effects.to_frame()
    table["period"] = pd.to_datetime(table["period"]).dt.strftime("%Y-%m-%d")
    shown = table[
        ["contrast", "period", "n_units", "estimate", "ci_low", "ci_high", "p_value", "p_holm"]
    ].round({"estimate": 3, "ci_low": 3, "ci_high": 3, "p_value": 3, "p_holm": 3})
    shown = shown.rename(
        columns={
            "estimate": f"effect (incidents per unit per {freq})",
            "p_value": "p (unadjusted)",
            "p_holm": "p (Holm)",
        }
    ).set_index("period")  # the contrast is a column, its rows in time order
    return OverTimeSection(
        freq=freq,
        window=(str(window[0]), str(window[1])),
        series_png=_figure(lambda ax: plot_over_time(shown_series, window, ax=ax), (7.0, 3.6)),
        effects_png=_figure(lambda ax: plot_period_effects(effects, ax=ax), (7.0, 3.6)),
        pre_trend=trend,
        effects=shown,
        notes=(MULTIPLICITY_NOTE, PRIMARY_NOTE, *effects.notes),
    )
