"""The delivery monitor: was each week's planned presence delivered, and kept away from controls?

Run weekly while the trial runs. For one week (ISO, Monday to Sunday) and
every exposure condition of the assignment it gives the number of places,
the share of places at the planned dose (minutes present at least
``planned_minutes``), the share with any presence and the mean minutes
present. For treated places a shortfall is under-service; for control places
(spillover bands and pure control) presence is contamination. It lists the
under-served treated places and the visited control places for the field
supervisor, draws a weekly chart over every week seen so far, and appends
the week's rows to the trial file as a dated record (layer
``delivery_weekly``) under the trial's lock, never touching the assignment.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

import numpy as np
import pandas as pd

from geoexp.delivery._table import Dosage
from geoexp.errors import InputError

RECORD_LAYER = "delivery_weekly"


@dataclass(frozen=True, eq=False)
class DeliveryWeek:
    """The monitor's view of one week.

    Attributes
    ----------
    week : numpy.datetime64
        The Monday the week starts on.
    by_condition : pandas.DataFrame
        Per condition: ``places``, ``at_dose_share``, ``any_presence_share``,
        ``mean_minutes`` (minutes present per place) and ``mean_visits``.
    under_served : pandas.DataFrame
        Treated places below the planned dose: minutes present, visits, shortfall in minutes.
    visited_controls : pandas.DataFrame
        Control places (spillover bands, pure control) with any presence.
    planned_minutes : float
    """

    week: np.datetime64
    by_condition: pd.DataFrame
    under_served: pd.DataFrame
    visited_controls: pd.DataFrame
    planned_minutes: float

    def __str__(self) -> str:
        table = self.by_condition.copy()
        table["at_dose_share"] = (100 * table["at_dose_share"]).map("{:.0f}%".format)
        table["any_presence_share"] = (100 * table["any_presence_share"]).map("{:.0f}%".format)
        table["mean_minutes"] = table["mean_minutes"].map("{:.1f} min".format)
        table["mean_visits"] = table["mean_visits"].map("{:.2f}".format)
        return (
            f"Delivery in the week of {self.week} (planned dose {self.planned_minutes:g} minutes "
            "per treated place per week)\n"
            f"{table.to_string()}\n"
            f"{len(self.under_served):,} treated places under the planned dose; "
            f"{len(self.visited_controls):,} control places with presence (contamination)"
        )

    def record(self, recorded_at: str | None = None) -> pd.DataFrame:
        """The week's rows for the trial file's ``delivery_weekly`` layer."""
        when = recorded_at or dt.datetime.now(dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
        rows = self.by_condition.reset_index()
        rows.insert(0, "week", str(self.week))
        rows["planned_minutes"] = self.planned_minutes
        rows["under_served"] = np.where(rows["condition"] == "treated", len(self.under_served), 0)
        rows["recorded_at"] = when
        return rows


def delivery_week(
    assignment: pd.DataFrame,
    dosage: Dosage,
    week: str | np.datetime64,
    *,
    planned_minutes: float,
) -> DeliveryWeek:
    """Delivery per exposure condition in one ISO week.

    Parameters
    ----------
    assignment : pandas.DataFrame
        Indexed by unit id, with a ``condition`` column (``treated``,
        ``spillover_k``, ``pure_control``), as the trial file's assignment layer.
    dosage : Dosage
        Weekly dose (``StayTable.dosage("week")``).
    week : str or numpy.datetime64
        Any day of the week wanted (ISO date); the week starts on its Monday.
    planned_minutes : float
        Minutes of presence per treated place per week the plan asks for.

    Returns
    -------
    DeliveryWeek
    """
    if dosage.freq != "week":
        raise InputError(f"the monitor needs weekly doses, got freq={dosage.freq!r}")
    if not (np.isfinite(planned_minutes) and planned_minutes > 0):
        raise InputError(f"planned_minutes must be a positive number, got {planned_minutes!r}")
    if "condition" not in assignment.columns:
        raise InputError("the assignment has no 'condition' column")
    try:
        day = np.datetime64(str(week), "D")
    except ValueError:
        raise InputError(f"week must be an ISO date such as 2025-03-03, got {week!r}") from None
    n = day.astype(np.int64)
    monday = (n - (n + 3) % 7).astype("datetime64[D]")
    rows = dosage.frame[dosage.frame["period"] == monday]
    per = rows.set_index("unit")[["minutes", "visits"]].reindex(assignment.index).fillna(0.0)
    per["condition"] = assignment["condition"].astype(str)
    per["at_dose"] = per["minutes"] >= planned_minutes
    per["any"] = per["minutes"] > 0
    order = sorted(per["condition"].unique(), key=_condition_order)
    by = (
        per.groupby("condition")
        .agg(
            places=("minutes", "size"),
            at_dose_share=("at_dose", "mean"),
            any_presence_share=("any", "mean"),
            mean_minutes=("minutes", "mean"),
            mean_visits=("visits", "mean"),
        )
        .reindex(order)
    )
    treated = per[per["condition"] == "treated"]
    under = treated[~treated["at_dose"]][["minutes", "visits"]].copy()
    under["shortfall_minutes"] = planned_minutes - under["minutes"]
    under = under.sort_values("shortfall_minutes", ascending=False, kind="stable")
    controls = per[(per["condition"] != "treated") & per["any"]][["condition", "minutes", "visits"]]
    controls = controls.sort_values("minutes", ascending=False, kind="stable")
    return DeliveryWeek(monday, by, under, controls, float(planned_minutes))


def _condition_order(label: str) -> tuple[int, int]:
    if label == "treated":
        return (0, 0)
    if label.startswith("spillover_") and label[10:].isdigit():
        return (1, int(label[10:]))
    return (2, 0)


def weekly_delivery(
    assignment: pd.DataFrame, dosage: Dosage, *, planned_minutes: float
) -> pd.DataFrame:
    """Every week of ``dosage``: mean minutes and share at the planned dose per condition.

    Parameters
    ----------
    assignment : pandas.DataFrame
        Indexed by unit id, with a ``condition`` column (``treated``,
        ``spillover_k``, ``pure_control``), as the trial file's assignment layer.
    dosage : Dosage
        Weekly dose (``StayTable.dosage("week")``).
    planned_minutes : float
        Minutes of presence per treated place per week the plan asks for.

    Returns
    -------
    pandas.DataFrame
        One row per week and condition, weeks in time order: ``week`` (its
        Monday), ``condition``, ``mean_minutes`` (minutes present per place
        per week) and ``at_dose_share`` (share of the condition's places that
        reached ``planned_minutes``), plus ``places``, ``any_presence_share``
        and ``mean_visits`` as in :func:`delivery_week`; empty (the first
        four columns only) when ``dosage`` holds no week.
    """
    weeks = sorted(dosage.frame["period"].unique())
    frames = []
    for week in weeks:  # a handful of weeks: one pass of vectorised work each
        summary = delivery_week(assignment, dosage, week, planned_minutes=planned_minutes)
        frames.append(summary.by_condition.assign(week=summary.week).reset_index())
    if not frames:
        return pd.DataFrame(columns=["week", "condition", "mean_minutes", "at_dose_share"])
    return pd.concat(frames, ignore_index=True)


def plot_weekly_delivery(table: pd.DataFrame, planned_minutes: float, ax=None):
    """Weekly chart: mean minutes present per place by condition, the planned dose dashed.

    Parameters
    ----------
    table : pandas.DataFrame
        The output of :func:`weekly_delivery`: columns ``week``, ``condition``
        and ``mean_minutes`` (minutes present per place per week).
    planned_minutes : float
        Minutes of presence per treated place per week the plan asks for,
        drawn as a dashed horizontal line.
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
    for condition, rows in table.groupby("condition", sort=False):
        rows = rows.sort_values("week")
        ax.plot(pd.to_datetime(rows["week"]), rows["mean_minutes"], marker="o", label=condition)
    ax.axhline(planned_minutes, color="0.3", linestyle="--", linewidth=1, label="planned (treated)")
    ax.set_ylabel("minutes present per place per week")
    ax.set_xlabel("week starting (Monday)")
    ax.set_title("Delivery by exposure condition")
    ax.legend(fontsize="small", frameon=False)
    ax.figure.autofmt_xdate()
    return ax
