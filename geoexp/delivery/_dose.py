"""A dose-response figure: outcome by minutes present, labelled descriptive, not causal.

Places that got more presence differ from places that got less in ways the
assignment did not decide (supervisors send patrols where trouble is), so
this figure describes; only the intention-to-treat contrast and the complier
effect beside it have a causal reading.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from geoexp.errors import InputError


def dose_response_table(minutes, y, condition, *, bins: int = 5) -> pd.DataFrame:
    """Mean outcome per dose group (no presence, then quantile bins of positive minutes).

    Parameters
    ----------
    minutes : array_like
        Minutes present per place.
    y : array_like
        Outcome per place (e.g. incidents in the post-period), one per place.
    condition : array_like
        Exposure condition of each place (compared as text).
    bins : int
        Number of quantile bins of the positive minutes (fewer when quantiles
        coincide); places with no presence form group 0.

    Returns
    -------
    pandas.DataFrame
        One row per condition and dose group: ``condition``, ``group``,
        ``places`` (count), ``mean_minutes`` and ``mean_outcome``.

    Raises
    ------
    geoexp.errors.InputError
        Inputs of different lengths, or ``bins`` below 1.
    """
    minutes = np.asarray(minutes, dtype=float)
    y = np.asarray(y, dtype=float)
    condition = np.asarray(condition).astype(str)
    if not (minutes.shape == y.shape == condition.shape):
        raise InputError("minutes, y and condition need one value per place")
    if bins < 1:
        raise InputError(f"bins must be >= 1, got {bins!r}")
    positive = minutes > 0
    edges = (
        np.unique(np.quantile(minutes[positive], np.linspace(0, 1, bins + 1)))
        if positive.any()
        else np.array([])
    )
    group = np.zeros(minutes.size, dtype=np.int64)
    if len(edges) > 1:
        group[positive] = 1 + np.clip(
            np.searchsorted(edges, minutes[positive], side="right") - 1, 0, len(edges) - 2
        )
    elif positive.any():
        group[positive] = 1
    table = (
        pd.DataFrame({"condition": condition, "group": group, "minutes": minutes, "y": y})
        .groupby(["condition", "group"])
        .agg(places=("y", "size"), mean_minutes=("minutes", "mean"), mean_outcome=("y", "mean"))
        .reset_index()
    )
    return table


def plot_dose_response(table: pd.DataFrame, ax=None, *, outcome_label: str = "incidents per place"):
    """Mean outcome against mean minutes per dose group, one line per condition.

    Descriptive only: places were not randomized to their dose, so the chart
    does not show a causal effect of presence.

    Parameters
    ----------
    table : pandas.DataFrame
        The output of :func:`dose_response_table`.
    ax : matplotlib.axes.Axes, optional
        Axes to draw on; a new 6 x 3.5 inch figure by default.
    outcome_label : str
        Label of the vertical axis, with the outcome's units.

    Returns
    -------
    matplotlib.axes.Axes
        The axes drawn on.
    """
    import matplotlib.pyplot as plt

    if ax is None:
        _, ax = plt.subplots(figsize=(6, 3.5))
    for condition, rows in table.groupby("condition", sort=True):
        ax.plot(rows["mean_minutes"], rows["mean_outcome"], marker="o", label=condition)
    ax.set_xlabel("minutes present per place (dose groups)")
    ax.set_ylabel(outcome_label)
    ax.set_title("Outcome by presence: descriptive, not causal")
    ax.legend(fontsize="small", frameon=False)
    return ax
