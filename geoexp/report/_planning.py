"""Planning figures: P(treated) across eligible units, balance across draws, the unit flow, power.

Each drawing function takes ``ax=`` and returns it; :func:`save_check_figures`
and :func:`save_power_figure` write them as PNG files for the ``check`` and
``power`` commands and the demo. Every figure is drawn from the numbers the
printed tables hold (the design check's probabilities and per-draw balance,
the power curve's table), never from a separate run.
"""

from __future__ import annotations

import textwrap
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
from matplotlib.figure import Figure

from geoexp._atomic import atomic_path
from geoexp.maps import PRINT_RC

if TYPE_CHECKING:
    from geoexp.design import DesignCheck, UnitFlow
    from geoexp.power import PowerCurve

BLUE, VERMILLION, GREY = "#0072B2", "#D55E00", "0.45"  # Okabe & Ito (2008)
CHECK_FIGURES = ("probability", "balance", "flow")


def _new_ax(ax, size=(6.4, 3.6)):
    if ax is not None:
        return ax
    return Figure(figsize=size).subplots()


def probability_plot(check: DesignCheck, ax=None):
    """Histogram of P(treated) across the eligible units, with its range and the share m/n.

    Parameters
    ----------
    check : DesignCheck
        The design check; its probabilities of being treated are plotted for
        the units that can be treated.
    ax : matplotlib.axes.Axes, optional
        Axes to draw on; a new figure by default.

    Returns
    -------
    matplotlib.axes.Axes
        The axes drawn on.
    """
    ax = _new_ax(ax)
    p = check.probabilities.probabilities[:, 0]
    p = p[p > 0]
    bins = np.linspace(p.min(), p.max(), 21) if p.size and np.ptp(p) > 0 else 10
    ax.hist(p, bins=bins, color=BLUE, edgecolor="white")
    if p.size:
        ax.axvline(p.mean(), color=VERMILLION, ls="--", lw=1.2, label=f"mean {p.mean():.3f}")
        ax.legend(loc="upper right", fontsize=8)
    ax.set_xlabel("probability of being treated (share of Monte Carlo draws)")
    ax.set_ylabel("eligible units (count)")
    ax.set_title(
        f"P(treated) across {p.size:,} units that can be treated "
        f"({check.n_draws:,} draws; range {p.min():.3f} to {p.max():.3f})"
        if p.size
        else "P(treated): no unit can be treated",
        fontsize=9,
    )
    return ax


def balance_plot(check: DesignCheck, ax=None):
    """Standardized differences across draws per covariate and contrast, the drawn value marked.

    Parameters
    ----------
    check : DesignCheck
        The design check with its balance table and the standardized
        differences of every draw (in covariate standard deviations).
    ax : matplotlib.axes.Axes, optional
        Axes to draw on; a new figure by default.

    Returns
    -------
    matplotlib.axes.Axes
        The axes drawn on.
    """
    ax = _new_ax(ax, (6.4, 3.8))
    rows = []
    for (covariate, contrast), row in check.balance.iterrows():
        draws = check.balance_draws.get(contrast)
        if draws is None:
            continue
        j = list(dict.fromkeys(check.balance.index.get_level_values(0))).index(covariate)
        v = draws[:, j]
        rows.append((f"{covariate}\n{contrast}", v[np.isfinite(v)], row.get("drawn", np.nan)))
    if not rows:
        ax.text(0.5, 0.5, "no covariates to check", ha="center", va="center")
        ax.set_axis_off()
        return ax
    pos = np.arange(len(rows))
    ax.boxplot(
        [r[1] for r in rows], positions=pos, orientation="horizontal", widths=0.5, showfliers=False
    )
    drawn = np.array([r[2] for r in rows], dtype=float)
    ax.plot(drawn, pos, "D", color=VERMILLION, ms=7, label="the drawn assignment")
    ax.axvspan(-0.1, 0.1, color="0.9", zorder=0, label="|d| ≤ 0.1")
    ax.axvline(0, color=GREY, lw=0.8)
    ax.set_yticks(pos, [r[0] for r in rows], fontsize=7)
    ax.set_xlabel("standardized difference d (covariate standard deviations)")
    ax.set_title(f"Balance across {check.n_draws:,} draws of the design", fontsize=9)
    ax.legend(loc="best", fontsize=7)
    return ax


def flow_plot(flow: UnitFlow, ax=None):
    """The flow of units as boxes: all, each eligibility step, randomized, analysed.

    Parameters
    ----------
    flow : UnitFlow
        The counts of units at each step (:func:`geoexp.design.unit_flow`).
    ax : matplotlib.axes.Axes, optional
        Axes to draw on; a new figure by default.

    Returns
    -------
    matplotlib.axes.Axes
        The axes drawn on.
    """
    n = len(flow.steps)
    ax = _new_ax(ax, (6.4, 1.4 * n + 0.4))
    ax.set_xlim(0, 1)
    ax.set_ylim(-n + 0.3, 0.9)
    ax.set_axis_off()
    for i, step in enumerate(flow.steps):
        y = -i
        text = f"{step.label}: {step.n_units:,} units"
        ax.text(
            0.32,
            y + 0.35,
            text,
            ha="center",
            va="center",
            fontsize=9,
            fontweight="bold",
            bbox={"boxstyle": "round,pad=0.4", "fc": "#eef4fa", "ec": BLUE},
        )
        if step.detail:
            detail = textwrap.fill(step.detail, 48)
            ax.text(0.32, y + 0.1, detail, ha="center", va="top", fontsize=6.5, color="0.25")
        if step.n_removed:
            ax.annotate(
                f"{step.n_removed:,} removed",
                xy=(0.32, y + 0.85),
                xytext=(0.7, y + 0.7),
                ha="left",
                va="center",
                fontsize=8,
                color=VERMILLION,
                arrowprops={"arrowstyle": "<-", "color": VERMILLION, "lw": 0.8},
            )
        if i + 1 < n:
            ax.annotate(
                "",
                xy=(0.32, y - 0.5),
                xytext=(0.32, y - 0.2),
                arrowprops={"arrowstyle": "->", "color": GREY},
            )
    ax.set_title("Units through the design", fontsize=10)
    return ax


def power_curve_plot(curve: PowerCurve, ax=None):
    """Power against the planted rate ratio, one line per number treated, target power marked.

    Bars are 95% Monte Carlo intervals (1.96 Monte Carlo standard errors).

    Parameters
    ----------
    curve : PowerCurve
        Simulated power per planted rate ratio and number of treated units.
    ax : matplotlib.axes.Axes, optional
        Axes to draw on; a new figure by default.

    Returns
    -------
    matplotlib.axes.Axes
        The axes drawn on.
    """
    from geoexp.power import TARGET_POWER

    ax = _new_ax(ax)
    markers = "os^Dv"
    for i, (m, rows) in enumerate(curve.table.groupby("n_treated")):
        rows = rows.sort_values("rate_ratio")
        own = int(m) == curve.n_treated
        ax.errorbar(
            rows["rate_ratio"],
            rows["power"],
            yerr=1.96 * rows["mc_error"],
            marker=markers[i % len(markers)],
            lw=2.2 if own else 1.2,
            ls="-" if own else "--",
            capsize=3,
            label=f"{int(m)} treated" + (" (the design)" if own else ""),
        )
    ax.axhline(TARGET_POWER, color="black", ls=":", lw=1.2, label=f"power {TARGET_POWER:g}")
    ax.axhline(curve.alpha, color=GREY, ls=":", lw=0.8)
    ax.set_ylim(0, 1)
    ax.set_xlabel("planted rate ratio on treated units (0.8 = 20% fewer incidents)")
    ax.set_ylabel("power (share of simulated trials that reject)")
    ax.set_title(
        f"Power of the direct-effect test ({curve.n_sims} simulated trials per point; "
        "bars: 95% Monte Carlo interval)",
        fontsize=9,
    )
    ax.legend(loc="best", fontsize=7)
    return ax


def _save(draw, size, path: Path) -> Path:
    import matplotlib

    with matplotlib.rc_context(PRINT_RC):
        fig = Figure(figsize=size)
        draw(fig.subplots())
        with atomic_path(path) as tmp:
            fig.savefig(tmp, format="png", dpi=130, bbox_inches="tight")
    return path


def save_check_figures(
    check: DesignCheck, flow: UnitFlow, folder: str | Path, *, prefix: str = "design_check"
) -> list[Path]:
    """Write the design check's figures as PNG files in ``folder``; return their paths.

    ``<prefix>_probability.png`` (P(treated) across eligible units),
    ``<prefix>_balance.png`` (balance across draws, the drawn value marked) and
    ``<prefix>_flow.png`` (units through the design).

    Parameters
    ----------
    check : DesignCheck
        The design check to draw.
    flow : UnitFlow
        The counts of units at each step of the design.
    folder : path
        Folder to write to (created when missing).
    prefix : str
        Start of every file name.

    Returns
    -------
    list of pathlib.Path
        The probability, balance and flow figures, in that order.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    return [
        _save(
            lambda ax: probability_plot(check, ax), (6.4, 3.6), folder / f"{prefix}_probability.png"
        ),
        _save(lambda ax: balance_plot(check, ax), (6.4, 3.8), folder / f"{prefix}_balance.png"),
        _save(
            lambda ax: flow_plot(flow, ax),
            (6.4, 1.4 * len(flow.steps) + 0.4),
            folder / f"{prefix}_flow.png",
        ),
    ]


def save_power_figure(curve: PowerCurve, path: str | Path) -> Path:
    """Write the power curve as a PNG file; return its path.

    Parameters
    ----------
    curve : PowerCurve
        Simulated power per planted rate ratio and number of treated units.
    path : path
        PNG file to write (its folder is created when missing).

    Returns
    -------
    pathlib.Path
        The written file.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    return _save(lambda ax: power_curve_plot(curve, ax), (6.4, 3.8), path)
