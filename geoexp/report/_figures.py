"""The report's figures: effect by distance band, and PNG bytes of a figure."""

from __future__ import annotations

import io
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from geoexp.analysis import Analysis


def distance_decay_plot(analysis: Analysis, ax=None):
    """Spillover estimate with its interval for each distance band (and the direct effect).

    Returns the matplotlib Axes.

    Parameters
    ----------
    analysis : geoexp.analysis.Analysis
        The analysis: its effects (incidents per unit), intervals and band
        edges.
    ax : matplotlib.axes.Axes, optional
        The axes to draw on (default: a new 6.4 by 3.6 inch figure).

    Returns
    -------
    matplotlib.axes.Axes
        The axes: distance to the nearest treated unit (metres or feet, as the
        analysis) across, effect in incidents per unit up.
    """
    if ax is None:
        import matplotlib.pyplot as plt  # interactive use only; reports draw on plain Figures

        _, ax = plt.subplots(figsize=(6.4, 3.6))
    scale = 1.0 if analysis.distance_unit == "m" else 1 / 0.3048
    edges = (0.0, *(e * scale for e in analysis.band_edges))
    mids = [(a + b) / 2 for a, b in zip(edges[:-1], edges[1:], strict=True)]
    # the intervals printed beside the verdicts (test inversion), else the approximation
    bounds = [
        (v.ci_low, v.ci_high) if np.isfinite([v.ci_low, v.ci_high]).all() else (e.ci_low, e.ci_high)
        for e, v in zip(analysis.effects, analysis.verdicts, strict=True)
    ]
    spill = analysis.effects[1:]
    # each band row at its band's middle (a band with no units above the floor has no row)
    bands = [r.estimand.exposure - 1 for r in analysis.rows[1 : len(analysis.effects)]]
    if len(bands) == len(spill):
        mids = [mids[b] for b in bands]
    est = np.array([e.estimate for e in spill])
    lo = np.array([b[0] for b in bounds[1:]])
    hi = np.array([b[1] for b in bounds[1:]])
    ax.axhline(0, color="0.4", lw=1, ls="--")
    ax.errorbar(
        mids,
        est,
        yerr=[est - lo, hi - est],
        fmt="o-",
        color="#0072B2",
        capsize=4,
        label="spillover vs pure control",
    )
    for a, b in zip(edges[:-1], edges[1:], strict=True):
        ax.axvspan(a, b, color="0.93" if (a // 1) % 2 == 0 else "0.97", zorder=0)
    d = analysis.effects[0]
    ax.errorbar(
        [0],
        [d.estimate],
        yerr=[[d.estimate - bounds[0][0]], [bounds[0][1] - d.estimate]],
        fmt="s",
        color="#D55E00",
        capsize=4,
        label="treated vs pure control",
    )
    ax.set_xlabel(f"distance to the nearest treated unit ({analysis.distance_unit})")
    ax.set_ylabel("effect (incidents per unit)")
    ax.set_title("Effect by distance from treated units")
    ax.legend(loc="best", fontsize=8)
    return ax


def png_bytes(fig) -> bytes:
    """The figure as PNG bytes (130 dpi, tight box), math text off for user strings."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=130, bbox_inches="tight")
    return buf.getvalue()
