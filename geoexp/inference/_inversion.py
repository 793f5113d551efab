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

from collections.abc import Sequence
from typing import TYPE_CHECKING

import numpy as np

from geoexp._rng import RngLike, Stream
from geoexp.inference._draws import ContrastSpec
from geoexp.inference._models import InvertedTest
from geoexp.inference._shared import SharedDraws, same_condition

if TYPE_CHECKING:
    from geoexp.design import Design


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
    k = same_condition(contrasts)[0]
    shared = SharedDraws(
        design, n_draws, design.stream(Stream.INVERSION, k) if rng is None else rng
    )
    pending = shared.additive(
        observed,
        y,
        probabilities,
        contrasts,
        effects,
        level=level,
        centers=centers,
        scales=scales,
        nulls=nulls,
        interval=interval,
    )
    shared.run()
    return pending.result()


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
    k = same_condition(contrasts)[0]
    shared = SharedDraws(
        design, n_draws, design.stream(Stream.RATE_RATIO, k) if rng is None else rng
    )
    pending = shared.rate_ratio(
        observed,
        y,
        probabilities,
        contrasts,
        ratios,
        level=level,
        nulls=nulls,
        interval=interval,
        baselines=baselines,
    )
    shared.run()
    return pending.result()
