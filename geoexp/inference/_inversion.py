"""Intervals by inverting randomization tests (Rosenbaum 2002), and the test at the null value.

Two models of the effect, each fixing every potential outcome once its
parameters are given, so that each candidate value is tested exactly with the
design's own draws:

- constant additive effects, Y_i(c) = Y_i(pure control) + tau_c;
- constant rate ratios, Y_i(c) = rho_c Y_i(pure control) (post-period counts).

For both, the statistic of every draw is a function of per-draw weighted sums
that do not depend on the candidate value, so one pass of the exposure engine
over the draws serves every candidate. The p-values come from the one
significance routine (equal-tailed two-sided), and the test printed beside an
interval is the same test at the null value (0 or 1) computed from the same
draws, so the interval excludes the null value exactly when that test rejects
(up to the resolution of the search).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from geoexp._rng import RngLike, Stream
from geoexp._significance import RandomizationTest, significance
from geoexp.errors import InputError
from geoexp.inference._draws import ContrastSpec, draw_sums, population, weight_columns
from geoexp.inference._statistic import contrast_statistic

if TYPE_CHECKING:
    from geoexp.design import Design

# grid points of the first search; an end is refined by bisection to this relative width
_GRID = 161
_BISECT = 40


@dataclass(frozen=True, eq=False)
class InvertedTest:
    """A point estimate, the interval of values a randomization test does not reject, and
    the same test at the null value.

    Attributes
    ----------
    model
        ``"additive"`` (tau_c) or ``"rate ratio"`` (rho_c).
    estimate
        The observed contrast (difference of Hajek means; for the rate ratio,
        their ratio).
    ci_low, ci_high
        The set of values not rejected at 1 - level (its hull; an end is
        infinite when no rejection is found within a wide search).
    level
        Confidence level.
    test
        The same test at the null value (0 for additive, 1 for the rate ratio).
    connected
        False when the non-rejected values do not form one interval (the hull
        is reported); a verdict should then say so.
    """

    model: str
    estimate: float
    ci_low: float
    ci_high: float
    level: float
    test: RandomizationTest
    connected: bool = True

    @property
    def null_value(self) -> float:
        """0 for additive effects, 1 for rate ratios."""
        return 1.0 if self.model == "rate ratio" else 0.0

    @property
    def excludes_null(self) -> bool:
        """Whether the interval leaves out the null value."""
        return not (self.ci_low <= self.null_value <= self.ci_high)

    def __str__(self) -> str:
        pct = int(round(100 * self.level))
        return (
            f"{self.model} {self.estimate:+.4g}, {pct}% interval {self.ci_low:+.4g} to "
            f"{self.ci_high:+.4g} by test inversion; {self.test}"
        )


def _search(
    pvalues: Callable[[np.ndarray], np.ndarray],
    alpha: float,
    center: float,
    half: float,
    null_value: float,
    *,
    low_limit: float = -np.inf,
) -> tuple[float, float, bool]:
    """Hull of {x: p(x) > alpha}: a grid around ``center`` widened until both ends reject,
    the null value always on the grid, each end refined by bisection."""
    for _ in range(5):
        lo = max(center - half, low_limit)
        grid = np.union1d(np.linspace(lo, center + half, _GRID), [null_value])
        grid = grid[grid >= low_limit]
        p = pvalues(grid)
        inside = p > alpha
        if (inside[0] and grid[0] > low_limit) or inside[-1]:
            half *= 4
            continue
        break
    if not inside.any():
        return center, center, True
    idx = np.flatnonzero(inside)
    lo_i, hi_i = idx[0], idx[-1]
    connected = bool(inside[lo_i : hi_i + 1].all())

    def refine(a: float, b: float) -> float:
        # bisection between a rejected point a and a non-rejected point b
        for _ in range(_BISECT):
            mid = (a + b) / 2
            if pvalues(np.array([mid]))[0] > alpha:
                b = mid
            else:
                a = mid
        return (a + b) / 2

    if lo_i == 0:
        low = grid[0] if grid[0] <= low_limit else -np.inf
    else:
        low = refine(grid[lo_i - 1], grid[lo_i])
    high = np.inf if hi_i == grid.size - 1 else refine(grid[hi_i + 1], grid[hi_i])
    # the null value is on the grid: keep its status exact whatever the bisection did
    if inside[grid == null_value].any():
        low, high = min(low, null_value), max(high, null_value)
    elif low <= null_value <= high:
        connected = False
    return float(low), float(high), connected


def constant_effect_test(
    design: Design,
    observed: np.ndarray,
    y: np.ndarray,
    probabilities: np.ndarray,
    contrast: ContrastSpec,
    effects: np.ndarray,
    *,
    n_draws: int = 2000,
    rng: RngLike = None,
    level: float = 0.95,
    center: float | None = None,
    scale: float = 1.0,
    null: str | None = None,
    interval: bool = True,
) -> InvertedTest:
    """Interval for tau_k under Y_i(c) = Y_i(pure control) + tau_c, and the test of tau_k = 0.

    For each candidate tau_k (the other conditions' effects held at ``effects``,
    usually their point estimates; the reference condition's at 0) every
    potential outcome is fixed: Y_i(pure control) = Y_i - tau_{d_i}. The
    statistic is the Hajek contrast over the units of ``contrast`` (its mask
    and positive probabilities), recomputed for every draw of the design on the
    imputed outcomes, and compared with the observed estimate minus tau_k by
    the equal-tailed two-sided rule (Fisher 1935; Rosenbaum 2002, test
    inversion). The interval is the set of tau_k the test does not reject at
    1 - level; ``test`` is the same test at tau_k = 0 from the same draws.
    With ``interval=False`` only the test is computed (the interval is NaN).

    Parameters
    ----------
    design : geoexp.design.Design
        The trial's design; its sampler gives the randomization distribution.
    observed : numpy.ndarray
        Observed exposure condition code of every unit.
    y : numpy.ndarray
        Outcome per unit (e.g. incidents in the post-period, or the change).
    probabilities : numpy.ndarray
        (n_units, n_conditions) exposure probabilities of the design.
    contrast : ContrastSpec
        Condition codes ``k`` and ``l`` and the mask of the units compared.
    effects : numpy.ndarray
        Constant additive effect of every condition against the reference, one
        per condition code (in the outcome's units), held fixed for the
        conditions other than ``k``.
    n_draws : int
        Draws of the design for the test and the interval.
    rng : None, int, SeedSequence or Generator
        Default: the design's stream for test inversion of condition ``k``.
    level : float
        Confidence level of the interval.
    center : float, optional
        Where the search for the interval's ends starts; default the estimate.
    scale : float
        Typical size of the effect (e.g. the estimate's standard error): the
        search starts 8 times this either side of ``center``.
    null : str, optional
        Words for the null hypothesis in the result; a default names condition ``k``.
    interval : bool
        Compute the interval as well as the test.

    Returns
    -------
    InvertedTest
        The estimate, the test of no effect and the interval.
    """
    return constant_effect_tests(
        design,
        observed,
        y,
        probabilities,
        [contrast],
        effects,
        n_draws=n_draws,
        rng=rng,
        level=level,
        centers=[center],
        scales=[scale],
        nulls=[null],
        interval=interval,
    )[0]


def _shared_sums(
    design: Design, blocks: list[np.ndarray], n_draws: int, rng: RngLike
) -> list[np.ndarray]:
    """Per-draw sums of several blocks of columns from one pass over the same draws.

    Each column's sums are added up on their own, unit by unit, so a block's
    sums are the very numbers a pass with that block alone gives.
    """
    sums = draw_sums(design.sampler, design.graph, design.mapping, np.hstack(blocks), n_draws, rng)
    edges = np.cumsum([0] + [b.shape[1] for b in blocks])
    return [
        np.ascontiguousarray(sums[:, :, a:b]) for a, b in zip(edges[:-1], edges[1:], strict=True)
    ]


def _same_condition(contrasts: Sequence[ContrastSpec]) -> tuple[int, int]:
    """The conditions ``k`` and ``l`` that every contrast of a batch shares."""
    if not contrasts:
        raise InputError("at least one contrast is needed")
    pairs = {(c.k, c.l) for c in contrasts}
    if len(pairs) != 1:
        raise InputError(
            f"the contrasts of one batch must share their conditions (one stream of draws "
            f"serves them), got {sorted(pairs)}"
        )
    return pairs.pop()


def constant_effect_tests(
    design: Design,
    observed: np.ndarray,
    y: np.ndarray,
    probabilities: np.ndarray,
    contrasts: Sequence[ContrastSpec],
    effects: np.ndarray,
    *,
    n_draws: int = 2000,
    rng: RngLike = None,
    level: float = 0.95,
    centers: Sequence[float | None] | None = None,
    scales: Sequence[float] | None = None,
    nulls: Sequence[str | None] | None = None,
    interval: bool = True,
) -> list[InvertedTest]:
    """:func:`constant_effect_test` for several groups of units of the same condition at once.

    The contrasts share their conditions ``k`` and ``l`` (and so their stream
    of draws), and differ in their units. One pass of the exposure engine over
    the draws serves all of them; each result is the very result
    :func:`constant_effect_test` gives for its contrast alone with the same
    ``rng`` (Rosenbaum 2002, test inversion).

    Parameters
    ----------
    design : geoexp.design.Design
        The trial's design; its sampler gives the randomization distribution.
    observed : numpy.ndarray
        Observed exposure condition code of every unit.
    y : numpy.ndarray
        Outcome per unit (e.g. incidents in the post-period, or the change).
    probabilities : numpy.ndarray
        (n_units, n_conditions) exposure probabilities of the design.
    contrasts : sequence of ContrastSpec
        The contrasts, all with the same ``k`` and ``l``.
    effects : numpy.ndarray
        Constant additive effect of every condition against the reference, one
        per condition code, held fixed for the conditions other than ``k``.
    n_draws : int
        Draws of the design for the tests and the intervals.
    rng : None, int, SeedSequence or Generator
        Default: the design's stream for test inversion of condition ``k``.
    level : float
        Confidence level of the intervals.
    centers : sequence of float or None, optional
        Per contrast, where the search for the interval's ends starts (None:
        the estimate).
    scales : sequence of float, optional
        Per contrast, the typical size of the effect (default 1.0 each).
    nulls : sequence of str or None, optional
        Per contrast, words for the null hypothesis.
    interval : bool
        Compute the intervals as well as the tests.

    Returns
    -------
    list of InvertedTest
        One per contrast, in their order.

    Raises
    ------
    geoexp.errors.InputError
        No contrast, or contrasts of different conditions.
    """
    k, l = _same_condition(contrasts)
    y = np.asarray(y, dtype=float)
    n = len(contrasts)
    centers = [None] * n if centers is None else list(centers)
    scales = [1.0] * n if scales is None else list(scales)
    nulls = [None] * n if nulls is None else list(nulls)
    blocks = [weight_columns(y, probabilities, c, observed) for c in contrasts]
    rng = design.stream(Stream.INVERSION, k) if rng is None else rng
    sums = _shared_sums(design, blocks, n_draws, rng)
    effects = np.asarray(effects, dtype=float).copy()
    return [
        _additive(design, observed, cols, s, k, l, effects, n_draws, level, c, sc, nu, interval)
        for cols, s, c, sc, nu in zip(blocks, sums, centers, scales, nulls, strict=True)
    ]


def _additive(
    design: Design,
    observed: np.ndarray,
    cols: np.ndarray,
    sums: np.ndarray,
    k: int,
    l: int,
    effects: np.ndarray,
    n_draws: int,
    level: float,
    center: float | None,
    scale: float,
    null: str | None,
    interval: bool,
) -> InvertedTest:
    """One contrast's additive test and interval from its columns and their per-draw sums."""
    n_cond = design.mapping.n_conditions
    obs_k = cols[observed == k].sum(axis=0)
    obs_l = cols[observed == l].sum(axis=0)
    tau_hat = float(contrast_statistic(obs_k[0], obs_k[1], obs_l[2], obs_l[3]))
    sk, sl = sums[:, k, :], sums[:, l, :]

    def draws_at(grid: np.ndarray) -> np.ndarray:
        tau = np.repeat(effects[None, :], grid.size, axis=0)
        tau[:, k] = grid
        tau[:, l] = 0.0  # the reference condition of the model
        # A_k^r = sum_{D=k} y/pi_k - sum_c tau_c sum_{D=k, d=c} 1/pi_k  (R x G)
        a_k = sk[:, [0]] - sk[:, 4 : 4 + n_cond] @ tau.T
        a_l = sl[:, [2]] - sl[:, 4 + n_cond : 4 + 2 * n_cond] @ tau.T
        return contrast_statistic(a_k, sk[:, [1]], a_l, sl[:, [3]])

    def pvalues(grid: np.ndarray) -> np.ndarray:
        return significance(tau_hat - grid, draws_at(grid).T, "two-sided")[0]

    labels = design.mapping.labels
    p0, mc0, und0 = significance(tau_hat, draws_at(np.zeros(1))[:, 0], "two-sided")
    test = RandomizationTest(
        null=null or f"no effect on {labels[k]} units (constant additive effect 0)",
        statistic=tau_hat,
        p_value=p0,
        mc_error=mc0,
        n_draws=n_draws,
        alternative="two-sided",
        n_undefined=und0,
    )
    if not np.isfinite(tau_hat) or not interval:
        return InvertedTest("additive", tau_hat, np.nan, np.nan, level, test)
    centre = tau_hat if center is None else center
    low, high, connected = _search(pvalues, 1 - level, centre, max(8 * scale, 1e-6), 0.0)
    return InvertedTest("additive", tau_hat, low, high, level, test, connected)


def invert_constant_effect(
    design: Design,
    observed: np.ndarray,
    y: np.ndarray,
    probabilities: np.ndarray,
    contrast: ContrastSpec,
    effects: np.ndarray,
    *,
    n_draws: int = 2000,
    rng: RngLike = None,
    level: float = 0.95,
    estimator: str = "hajek",
    center: float = 0.0,
    scale: float = 1.0,
) -> tuple[float, float]:
    """Interval for tau_k under the model Y_i(c) = Y_i(pure control) + tau_c.

    The interval of :func:`constant_effect_test` (Rosenbaum 2002, test
    inversion with the equal-tailed two-sided rule of the one significance
    routine). Returns (low, high); an end is infinite where no rejection is
    found within a wide search range.

    Parameters
    ----------
    design : geoexp.design.Design
        The trial's design; its sampler gives the randomization distribution.
    observed : numpy.ndarray
        Observed exposure condition code of every unit.
    y : numpy.ndarray
        Outcome per unit (e.g. incidents in the post-period, or the change).
    probabilities : numpy.ndarray
        (n_units, n_conditions) exposure probabilities of the design.
    contrast : ContrastSpec
        Condition codes ``k`` and ``l`` and the mask of the units compared.
    effects : numpy.ndarray
        Constant additive effect of every condition against the reference, one
        per condition code (in the outcome's units), held fixed for the
        conditions other than ``k``.
    n_draws : int, default 2000
        Draws of the design for the interval.
    rng : None, int, SeedSequence or Generator
        Default: the design's stream for test inversion of condition ``k``.
    level : float, default 0.95
        Confidence level of the interval, a probability.
    estimator : {"hajek"}, default "hajek"
        The statistic; only the Hajek contrast is supported.
    center : float, default 0.0
        Where the search for the interval's ends starts.
    scale : float, default 1.0
        Typical size of the effect (e.g. the estimate's standard error): the
        search starts 8 times this either side of ``center``.

    Returns
    -------
    tuple of float
        ``(low, high)`` in the outcome's units; an end is infinite where no
        rejection is found.

    Raises
    ------
    ValueError
        ``estimator`` is not ``"hajek"``.
    """
    if estimator != "hajek":
        raise ValueError("test inversion is implemented for the Hajek statistic")
    result = constant_effect_test(
        design,
        observed,
        y,
        probabilities,
        contrast,
        effects,
        n_draws=n_draws,
        rng=rng,
        level=level,
        center=center,
        scale=scale,
    )
    return result.ci_low, result.ci_high


def _ratio_columns(
    y: np.ndarray,
    probabilities: np.ndarray,
    spec: ContrastSpec,
    observed: np.ndarray,
    baseline: np.ndarray | None,
) -> np.ndarray:
    """Columns b/pi_k, b/pi_l (b the baseline, or 1), then y 1[d = c]/pi_k and y 1[d = c]/pi_l
    for every condition c."""
    pop = population(probabilities, spec)
    pk, pl = probabilities[:, spec.k], probabilities[:, spec.l]
    n_cond = probabilities.shape[1]
    b = np.ones(y.size) if baseline is None else np.asarray(baseline, dtype=float)
    cols = np.zeros((y.size, 2 + 2 * n_cond))
    cols[pop, 0] = b[pop] / pk[pop]
    cols[pop, 1] = b[pop] / pl[pop]
    code = np.where(pop, observed, -1)
    rows = np.flatnonzero(pop)
    cols[rows, 2 + code[rows]] = y[rows] / pk[rows]
    cols[rows, 2 + n_cond + code[rows]] = y[rows] / pl[rows]
    return cols


def rate_ratio_test(
    design: Design,
    observed: np.ndarray,
    y: np.ndarray,
    probabilities: np.ndarray,
    contrast: ContrastSpec,
    ratios: np.ndarray,
    *,
    n_draws: int = 2000,
    rng: RngLike = None,
    level: float = 0.95,
    null: str | None = None,
    interval: bool = True,
    baseline: np.ndarray | None = None,
) -> InvertedTest:
    """Rate ratio rho_k under Y_i(c) = rho_c Y_i(pure control), its interval and the test of 1.

    The estimate is the ratio of the Hajek means of the post-period counts
    (``y``) of the two conditions over the contrast's units: what the exposed
    units had against what the same units would have had in the reference
    condition. For a candidate rho_k (the other conditions' ratios held at
    ``ratios``, the reference's at 1) every potential outcome is fixed,
    Y_i(reference) = Y_i / rho_{d_i}; the statistic log(mean_k / mean_l) of the
    imputed outcomes is recomputed for every draw and compared with the
    observed log ratio minus log rho_k by the equal-tailed two-sided rule. The
    interval inverts that test (Rosenbaum 2002, ch. 5, multiplicative effects);
    ``test`` is the test of rho_k = 1 from the same draws (with
    ``interval=False`` only the test is computed).

    With a ``baseline`` (each unit's pre-period count, which treatment cannot
    change), each side's Hajek mean of post-period counts is divided by its
    Hajek mean of baseline counts: the ratio compares each side's change
    against its own past, which removes most of the between-unit variation of
    hot spots and keeps the test exact (the baseline is fixed under every
    assignment). Its estimand is the same rho_k.

    Parameters
    ----------
    design : geoexp.design.Design
        The trial's design; its sampler gives the randomization distribution.
    observed : numpy.ndarray
        Observed exposure condition code of every unit.
    y : numpy.ndarray
        Outcome per unit: post-period counts (non-negative).
    probabilities : numpy.ndarray
        (n_units, n_conditions) exposure probabilities of the design.
    contrast : ContrastSpec
        Condition codes ``k`` and ``l`` and the mask of the units compared.
    ratios : numpy.ndarray
        Rate ratio of every condition against the reference, one per
        condition code, held fixed for the conditions other than ``k``.
    n_draws : int
        Draws of the design for the test and the interval.
    rng : None, int, SeedSequence or Generator
        Default: the design's rate-ratio stream of condition ``k``.
    level : float
        Confidence level of the interval.
    null : str, optional
        Words for the null hypothesis in the result; a default names condition ``k``.
    interval : bool
        Compute the interval as well as the test.
    baseline : numpy.ndarray, optional
        Pre-period count of each unit, to compare each side against its own past.

    Returns
    -------
    InvertedTest
        The rate ratio, the test of a ratio of 1 and the interval.
    """
    return rate_ratio_tests(
        design,
        observed,
        y,
        probabilities,
        [contrast],
        ratios,
        n_draws=n_draws,
        rng=rng,
        level=level,
        nulls=[null],
        interval=interval,
        baselines=[baseline],
    )[0]


def rate_ratio_tests(
    design: Design,
    observed: np.ndarray,
    y: np.ndarray,
    probabilities: np.ndarray,
    contrasts: Sequence[ContrastSpec],
    ratios: np.ndarray,
    *,
    n_draws: int = 2000,
    rng: RngLike = None,
    level: float = 0.95,
    nulls: Sequence[str | None] | None = None,
    interval: bool = True,
    baselines: Sequence[np.ndarray | None] | None = None,
) -> list[InvertedTest]:
    """:func:`rate_ratio_test` for several groups of units of the same condition at once.

    The contrasts share their conditions ``k`` and ``l`` (and so their stream
    of draws), and differ in their units. One pass of the exposure engine over
    the draws serves all of them; each result is the very result
    :func:`rate_ratio_test` gives for its contrast alone with the same ``rng``
    (Rosenbaum 2002, ch. 5, multiplicative effects).

    Parameters
    ----------
    design : geoexp.design.Design
        The trial's design; its sampler gives the randomization distribution.
    observed : numpy.ndarray
        Observed exposure condition code of every unit.
    y : numpy.ndarray
        Outcome per unit: post-period counts (non-negative).
    probabilities : numpy.ndarray
        (n_units, n_conditions) exposure probabilities of the design.
    contrasts : sequence of ContrastSpec
        The contrasts, all with the same ``k`` and ``l``.
    ratios : numpy.ndarray
        Rate ratio of every condition against the reference, one per
        condition code, held fixed for the conditions other than ``k``.
    n_draws : int
        Draws of the design for the tests and the intervals.
    rng : None, int, SeedSequence or Generator
        Default: the design's rate-ratio stream of condition ``k``.
    level : float
        Confidence level of the intervals.
    nulls : sequence of str or None, optional
        Per contrast, words for the null hypothesis.
    interval : bool
        Compute the intervals as well as the tests.
    baselines : sequence of numpy.ndarray or None, optional
        Per contrast, the pre-period count of each unit (or None).

    Returns
    -------
    list of InvertedTest
        One per contrast, in their order.

    Raises
    ------
    ValueError
        ``y`` has negative values.
    geoexp.errors.InputError
        No contrast, or contrasts of different conditions.
    """
    k, l = _same_condition(contrasts)
    y = np.asarray(y, dtype=float)
    if (y < 0).any():
        raise ValueError("rate ratios need counts (non-negative outcomes)")
    n = len(contrasts)
    nulls = [None] * n if nulls is None else list(nulls)
    baselines = [None] * n if baselines is None else list(baselines)
    blocks = [
        _ratio_columns(y, probabilities, c, observed, b)
        for c, b in zip(contrasts, baselines, strict=True)
    ]
    rng = design.stream(Stream.RATE_RATIO, k) if rng is None else rng
    sums = _shared_sums(design, blocks, n_draws, rng)
    ratios = np.asarray(ratios, dtype=float).copy()
    return [
        _ratio(design, observed, cols, s, k, l, ratios, n_draws, level, null, interval)
        for cols, s, null in zip(blocks, sums, nulls, strict=True)
    ]


def _ratio(
    design: Design,
    observed: np.ndarray,
    cols: np.ndarray,
    sums: np.ndarray,
    k: int,
    l: int,
    ratios: np.ndarray,
    n_draws: int,
    level: float,
    null: str | None,
    interval: bool,
) -> InvertedTest:
    """One contrast's rate-ratio test and interval from its columns and their per-draw sums."""
    n_cond = design.mapping.n_conditions
    obs_k = cols[observed == k].sum(axis=0)
    obs_l = cols[observed == l].sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = float((obs_k[2 + k] / obs_k[0]) / (obs_l[2 + n_cond + l] / obs_l[1]))
    sk, sl = sums[:, k, :], sums[:, l, :]

    def draws_at(log_grid: np.ndarray) -> np.ndarray:
        rho = np.repeat(ratios[None, :], log_grid.size, axis=0)
        rho[:, k] = np.exp(log_grid)
        rho[:, l] = 1.0
        num_k = sk[:, 2 : 2 + n_cond] @ (1 / rho).T
        num_l = sl[:, 2 + n_cond : 2 + 2 * n_cond] @ (1 / rho).T
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.log((num_k / sk[:, [0]]) / (num_l / sl[:, [1]]))

    log_hat = np.log(ratio) if ratio > 0 else np.nan

    def pvalues(log_grid: np.ndarray) -> np.ndarray:
        return significance(log_hat - log_grid, draws_at(log_grid).T, "two-sided")[0]

    labels = design.mapping.labels
    if not np.isfinite(log_hat):
        test = RandomizationTest(
            null=null or f"rate ratio 1 on {labels[k]} units",
            statistic=ratio,
            p_value=np.nan,
            mc_error=np.nan,
            n_draws=n_draws,
            alternative="two-sided",
        )
        return InvertedTest("rate ratio", ratio, np.nan, np.nan, level, test, True)
    p0, mc0, und0 = significance(log_hat, draws_at(np.zeros(1))[:, 0], "two-sided")
    test = RandomizationTest(
        null=null or f"rate ratio 1 on {labels[k]} units (no effect)",
        statistic=ratio,
        p_value=p0,
        mc_error=mc0,
        n_draws=n_draws,
        alternative="two-sided",
        n_undefined=und0,
    )
    if not interval:
        return InvertedTest("rate ratio", ratio, np.nan, np.nan, level, test, True)
    spread = np.nanstd(draws_at(np.array([log_hat]))[:, 0])
    low, high, connected = _search(
        pvalues, 1 - level, log_hat, max(8 * spread, 1e-3) if np.isfinite(spread) else 2.0, 0.0
    )
    return InvertedTest(
        "rate ratio", ratio, float(np.exp(low)), float(np.exp(high)), level, test, connected
    )
