"""Effects per post period: does the effect decay?

The pooled contrast over the whole post-period (:func:`geoexp.analysis.analyse`)
is the trial's primary result. Beside it, :func:`period_effects` estimates the
same contrasts in each post period (ISO week or calendar month) separately:
the treated contrast and, where the design has enough units that can be in
the first spillover band or pure controls, the band-1 contrast. Each period's
estimate is the Hajek contrast of the analysis, over the same units (the
positivity floor of the analysis applied), with the design's own randomization
test of no additive effect and the interval that inverts it
(:func:`geoexp.inference.constant_effect_test`; Fisher 1935, Rosenbaum 2002),
so each interval excludes 0 exactly when its own test rejects.

Many periods mean many tests. The intervals and p-values are per period and
unadjusted; beside them, the p-values adjusted by Holm's step-down method
(Holm 1979) control the chance of any false "effect in period t" across the
periods of one contrast. Read the series for its shape (a decay, a late
start), not for the one period that happens to stand out.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Literal

import numpy as np
import pandas as pd

from geoexp._rng import Stream
from geoexp.errors import InputError
from geoexp.exposure import DEFAULT_FLOOR, condition_bits, contrast_units
from geoexp.inference import MIN_FOCAL, ContrastSpec, constant_effect_test

if TYPE_CHECKING:
    from geoexp.design import Design
    from geoexp.trialfile import TrialFile

Outcome = Literal["change", "post"]

MULTIPLICITY_NOTE = (
    "Each period's interval and p-value are unadjusted; the Holm-adjusted p-values (Holm 1979) "
    "allow for testing every post period of a contrast. The pooled effect over the whole "
    "post-period is the primary result; read the periods for the shape of the effect over time."
)


def holm(p_values: np.ndarray) -> np.ndarray:
    """Holm's step-down adjusted p-values (Holm 1979).

    The i-th smallest of m p-values is multiplied by m - i + 1 (i from 1), the
    running maximum is taken in that order and the result capped at 1;
    rejecting the adjusted p-values below alpha controls the family-wise
    error rate at alpha. NaN p-values are left out of the family and stay NaN.

    Parameters
    ----------
    p_values : numpy.ndarray
        P-values of one family of tests.

    Returns
    -------
    numpy.ndarray
        Adjusted p-values, in the input's order.
    """
    p = np.asarray(p_values, dtype=float)
    out = np.full(p.shape, np.nan)
    ok = np.flatnonzero(np.isfinite(p))
    m = ok.size
    if m == 0:
        return out
    order = ok[np.argsort(p[ok], kind="stable")]
    scaled = p[order] * (m - np.arange(m))
    out[order] = np.minimum(1.0, np.maximum.accumulate(scaled))
    return out


@dataclass(frozen=True)
class PeriodEffects:
    """Per-period contrasts with their randomization tests and test-inversion intervals.

    ``table`` has one row per contrast and post period: ``contrast``,
    ``period`` (first day), ``n_units``, ``estimate``, ``ci_low``, ``ci_high``
    (incidents per unit per period), ``p_value`` (unadjusted), ``p_holm``
    (Holm-adjusted within the contrast), ``mc_error`` and ``n_draws``.
    """

    table: pd.DataFrame
    level: float
    freq: str
    outcome: str
    notes: tuple[str, ...] = ()

    def __str__(self) -> str:
        pct = f"{self.level:.0%}"
        lines = [
            f"Effects per post {self.freq} ({self.outcome}; incidents per unit per {self.freq}; "
            f"{pct} intervals by inverting each period's randomization test):"
        ]
        for contrast, rows in self.table.groupby("contrast", sort=False):
            lines.append(f"  {contrast} ({int(rows['n_units'].iloc[0]):,} units):")
            for r in rows.itertuples():
                lines.append(
                    f"    {pd.Timestamp(r.period).date()}  {r.estimate:+.3f} "
                    f"[{r.ci_low:+.3f}, {r.ci_high:+.3f}]  p = {r.p_value:.3f}, "
                    f"Holm-adjusted p = {r.p_holm:.3f}"
                )
        lines.append(MULTIPLICITY_NOTE)
        lines.extend(self.notes)
        return "\n".join(lines)

    def to_frame(self) -> pd.DataFrame:
        """The per-period table (a copy)."""
        return self.table.copy()


def _scale(y: np.ndarray, observed: np.ndarray, units: np.ndarray, k: int, l: int) -> float:
    """A rough standard error (Neyman's, unweighted) to start the interval search."""
    a, b = y[units & (observed == k)], y[units & (observed == l)]
    if a.size < 2 or b.size < 2:
        return 1.0
    return float(max(np.sqrt(a.var(ddof=1) / a.size + b.var(ddof=1) / b.size), 1e-6))


def period_effects(
    design: Design,
    observed: np.ndarray,
    probabilities: np.ndarray,
    outcomes: pd.DataFrame,
    *,
    baseline: np.ndarray | None = None,
    bands: bool = True,
    floor: float | None = None,
    n_draws: int = 2000,
    level: float = 0.95,
    freq: str = "week",
) -> PeriodEffects:
    """The treated and band-1 contrasts in each post period, each with its own test and interval.

    For each period (a column of ``outcomes``) the outcome is the count in
    that period, less ``baseline`` when given (e.g. the unit's mean count per
    period before the trial, a difference-in-differences per period). The
    contrast is the Hajek contrast against pure control over the units of the
    analysis (:func:`geoexp.exposure.contrast_units`: eligible units for the
    treated contrast, never-eligible units for the band, the positivity floor
    applied); its test and interval are :func:`geoexp.inference.constant_effect_test`
    (Rosenbaum 2002) with the design's draws, the other conditions' effects
    held at their estimates for that period. Holm's adjustment (Holm 1979) is
    applied within each contrast across periods.

    Parameters
    ----------
    design : geoexp.design.Design
        The trial's design; its sampler gives the randomization distribution.
    observed : numpy.ndarray
        Observed exposure condition code of every unit.
    probabilities : numpy.ndarray
        (n_units, n_conditions) exposure probabilities of the design.
    outcomes : pandas.DataFrame
        Incidents per unit (rows, in the design's unit order) and post period
        (columns, labelled by the period's first day).
    baseline : numpy.ndarray, optional
        Subtracted from every period's count (one value per unit).
    bands : bool
        Add the band-1 contrast where the design supports it (at least
        ``MIN_FOCAL`` units that can never be treated can be in band 1 or pure
        controls).
    floor : float, optional
        Positivity floor; default the spec's, else the project's default.
    n_draws : int
        Draws of the design for each test.
    level : float
        Confidence level of each interval.
    freq : str
        Word for the period (``"week"`` or ``"month"``), for the text.

    Returns
    -------
    PeriodEffects
    """
    n = design.graph.n
    observed = np.asarray(observed)
    probs = np.asarray(probabilities, dtype=float)
    values = outcomes.to_numpy(dtype=float)
    if values.shape[0] != n or observed.shape != (n,):
        raise InputError(f"outcomes and observed need one row per unit ({n})")
    if values.shape[1] == 0:
        raise InputError("there is no post period to estimate an effect for")
    if not np.isfinite(values).all():
        raise InputError("the per-period outcomes must be finite numbers for every unit")
    if not 0 < level < 1:
        raise InputError(f"level must be between 0 and 1, got {level!r}")
    base = np.zeros(n) if baseline is None else np.asarray(baseline, dtype=float)
    if base.shape != (n,) or not np.isfinite(base).all():
        raise InputError(f"the baseline needs one finite value per unit ({n})")
    mapping = design.mapping
    pc, labels = mapping.pure_control, mapping.labels
    floor = getattr(design, "positivity_floor", DEFAULT_FLOOR) if floor is None else float(floor)
    rows = [
        (
            0,
            contrast_units(
                probs, design.eligible, 0, pc, labels=labels, group="eligible", floor=floor
            ),
        )
    ]
    notes: list[str] = []
    if bands and pc > 1:
        band = contrast_units(
            probs, design.eligible, 1, pc, labels=labels, group="never-eligible", floor=floor
        )
        seen = band.units & (observed == 1)
        if band.n_units >= MIN_FOCAL and seen.any() and (band.units & (observed == pc)).any():
            rows.append((1, band))
        else:
            notes.append(
                f"No {labels[1]} contrast per period: only {band.n_units} units that are never "
                f"treated can be in {labels[1]} or pure control (at least {MIN_FOCAL} needed, "
                "with both conditions observed)."
            )
    out = []
    for j, period in enumerate(outcomes.columns):
        y = values[:, j] - base
        plug = np.zeros(mapping.n_conditions)
        for k, est in rows:
            u = est.units
            wk, wl = u & (observed == k), u & (observed == pc)
            if wk.any() and wl.any():
                plug[k] = np.average(y[wk], weights=1 / probs[wk, k]) - np.average(
                    y[wl], weights=1 / probs[wl, pc]
                )
        for k, est in rows:
            result = constant_effect_test(
                design,
                observed,
                y,
                probs,
                ContrastSpec(k, pc, est.units),
                plug,
                n_draws=n_draws,
                level=level,
                scale=_scale(y, observed, est.units, k, pc),
                null=f"no additive effect on {labels[k]} units in the {freq} of {period}",
            )
            out.append(
                {
                    "contrast": f"{labels[k]} vs {labels[pc]}",
                    "period": pd.Timestamp(period),
                    "n_units": int(est.n_units),
                    "estimate": result.estimate,
                    "ci_low": result.ci_low,
                    "ci_high": result.ci_high,
                    "p_value": result.test.p_value,
                    "mc_error": result.test.mc_error,
                    "n_draws": int(n_draws),
                }
            )
    table = pd.DataFrame(out)
    table.insert(
        table.columns.get_loc("p_value") + 1,
        "p_holm",
        table.groupby("contrast", sort=False)["p_value"].transform(
            lambda s: pd.Series(holm(s.to_numpy()), index=s.index)
        ),
    )
    # the treated contrast first, then the band's, each in time order
    first = table["contrast"].map({c: i for i, c in enumerate(dict.fromkeys(table["contrast"]))})
    table = (
        table.assign(_order=first)
        .sort_values(["_order", "period"], kind="stable", ignore_index=True)
        .drop(columns="_order")
    )
    words = "change from the pre-trial mean per period" if baseline is not None else "count"
    return PeriodEffects(table, float(level), freq, words, tuple(notes))


def effects_by_period(
    trial: TrialFile | str | os.PathLike,
    counts: pd.DataFrame,
    window: tuple[str, str],
    *,
    outcome: Outcome = "change",
    bands: bool = True,
    n_draws: int = 2000,
    level: float = 0.95,
) -> PeriodEffects:
    """Effects per post period of a trial file, from incidents counted per unit and period.

    The post periods are those whose first day falls within the trial window
    (both ends included). With ``outcome="change"`` each period's count is
    taken less the unit's mean count per period over the periods before the
    window (at least one is needed); with ``"post"`` the count itself. The
    exposure probabilities are the design's own Monte Carlo (the same stream
    as the analysis). See :func:`period_effects`.

    Parameters
    ----------
    trial : TrialFile or path
        A trial file with a drawn assignment.
    counts : pandas.DataFrame
        The output of :func:`geoexp.delivery.incidents_by_period`.
    window : tuple of str
        First and last day of the trial (ISO dates).
    outcome : {"change", "post"}
        Per-period count less the pre-trial mean per period, or the count.
    bands : bool
        Add the band-1 contrast where the design supports it.
    n_draws : int
        Draws of the design for each period's test.
    level : float
        Confidence level of each interval.

    Returns
    -------
    PeriodEffects
    """
    from geoexp.trialfile import TrialFile, design_from_trial

    if outcome not in ("change", "post"):
        raise InputError(f"outcome must be 'change' or 'post', got {outcome!r}")
    for column in ("unit", "period", "incidents"):
        if column not in counts.columns:
            raise InputError(f"the counts have no column {column!r}")
    tf = trial if isinstance(trial, TrialFile) else TrialFile.open(Path(trial))
    design, assignment = design_from_trial(tf)
    first, last = pd.Timestamp(window[0]), pd.Timestamp(window[1])
    if last < first:
        raise InputError(f"the trial window ends ({window[1]}) before it starts ({window[0]})")
    freq = counts.attrs.get("freq", "week")
    wide = counts.pivot_table(
        index="unit", columns="period", values="incidents", aggfunc="sum", fill_value=0
    )
    wide.columns = pd.DatetimeIndex(wide.columns)
    if len(wide.columns):
        step = "W-MON" if freq == "week" else "MS"
        wide = wide.reindex(
            columns=pd.date_range(wide.columns.min(), max(wide.columns.max(), last), freq=step),
            fill_value=0,
        )
    wide = wide.reindex(design.units.ids, fill_value=0)
    post = wide.loc[:, (wide.columns >= first) & (wide.columns <= last)]
    if post.shape[1] == 0:
        raise InputError(f"no {freq} starts within the trial window {window[0]} to {window[1]}")
    baseline = None
    if outcome == "change":
        pre = wide.loc[:, wide.columns < first]
        if pre.shape[1] == 0:
            raise InputError(
                f"outcome 'change' needs at least one {freq} before the trial window; "
                "use outcome='post'"
            )
        baseline = pre.to_numpy(dtype=float).mean(axis=1)
    bits = condition_bits(
        design.sampler,
        design.graph,
        design.mapping,
        design.spec.draws,
        design.stream(Stream.MONTE_CARLO),
    )
    return period_effects(
        design,
        assignment.conditions.astype(np.int64),
        bits.probabilities(),
        post,
        baseline=baseline,
        bands=bands,
        n_draws=n_draws,
        level=level,
        freq=freq,
    )


def plot_period_effects(effects: PeriodEffects, ax=None):
    """Each post period's effect with its interval, one series per contrast.

    Parameters
    ----------
    effects : PeriodEffects
        The output of :func:`period_effects` or :func:`effects_by_period`.
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
    table = effects.table
    contrasts = list(dict.fromkeys(table["contrast"]))
    step = pd.Timedelta(days=7 if effects.freq == "week" else 30)
    for i, contrast in enumerate(contrasts):
        rows = table[table["contrast"] == contrast]
        # side by side within a period, so that the intervals do not hide each other
        at = rows["period"] + step * (0.12 * (i - (len(contrasts) - 1) / 2))
        est = rows["estimate"].to_numpy()
        low = np.where(np.isfinite(rows["ci_low"]), rows["ci_low"], np.nan)
        high = np.where(np.isfinite(rows["ci_high"]), rows["ci_high"], np.nan)
        ax.errorbar(
            at,
            est,
            yerr=np.vstack([est - low, high - est]),
            fmt="o",
            markersize=3.5,
            capsize=2,
            linewidth=1.0,
            label=contrast,
        )
    ax.axhline(0.0, color="0.3", linewidth=0.8)
    ax.set_ylabel(f"effect, incidents per unit per {effects.freq}")
    ax.set_xlabel(f"{effects.freq} starting")
    ax.set_title(
        f"Effect per post {effects.freq}, {effects.level:.0%} intervals, each unadjusted\n"
        f"({len(table) // max(len(contrasts), 1)} {effects.freq}s = as many tests per contrast; "
        "Holm-adjusted p-values in the table; the pooled effect is the primary result)",
        fontsize="small",
    )
    ax.legend(fontsize="small", frameon=False)
    ax.figure.autofmt_xdate()
    return ax
