"""The sweep's figure: power against the number of units treated, one line per other choice."""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from geoexp.sweep._run import SweepResult


def plot_power(result: SweepResult, contrast: str | None = None, ax=None):
    """Power of one contrast against the expected number of treated units, per gap/bands/method.

    Each line joins the candidates that differ only in the number treated;
    bars are two Monte Carlo standard errors; the dashed line is the target
    power.

    Parameters
    ----------
    result : SweepResult
        The sweep's result.
    contrast : str, optional
        Contrast plotted; default the one the sweep ranks by.
    ax : matplotlib.axes.Axes, optional
        Axes to draw on; a new 7 x 4.5 inch figure by default.

    Returns
    -------
    matplotlib.axes.Axes
        The axes drawn on.
    """
    import matplotlib.pyplot as plt

    contrast = contrast or result.rank_contrast
    table = result.table
    column = f"power_{contrast}"
    if ax is None:
        _, ax = plt.subplots(figsize=(7, 4.5))
    if column not in table.columns:
        ax.text(0.5, 0.5, f"no candidate has a {contrast} contrast", ha="center")
        return ax
    others = [c for c in ("gap_m", "bands_m", "method") if table[c].nunique() > 1]
    groups = table.groupby(others, sort=True) if others else [((), table)]
    for key, group in groups:
        group = group.sort_values("expected_treated")
        key = key if isinstance(key, tuple) else (key,)
        label = ", ".join(
            f"{k}={v:g}" if isinstance(v, float) else f"{k}={v}"
            for k, v in zip(others, key, strict=True)
        )
        ax.errorbar(
            group["expected_treated"],
            group[column],
            yerr=2 * group[f"mc_error_{contrast}"],
            marker="o",
            capsize=3,
            label=label or None,
        )
    ax.axhline(result.target_power, linestyle="--", color="grey", linewidth=1)
    ax.set_ylim(-0.02, 1.02)
    ax.set_xlabel("treated units (expected number per trial)")
    ax.set_ylabel(f"power ({contrast} vs pure control, share of trials)")
    ax.set_title(f"{result.name}: power at alpha {result.alpha:g}")
    if others:
        ax.legend(fontsize="small", title=", ".join(others))
    return ax
