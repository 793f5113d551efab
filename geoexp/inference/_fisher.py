"""Fisher randomization test of the sharp null of no effect at all."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from geoexp._rng import RngLike, Stream
from geoexp._significance import Alternative, RandomizationTest
from geoexp.inference._draws import ContrastSpec, contrast_test
from geoexp.inference._statistic import Statistic

if TYPE_CHECKING:
    from geoexp.design import Design


def fisher_test(
    design: Design,
    observed: np.ndarray,
    y: np.ndarray,
    probabilities: np.ndarray,
    contrast: ContrastSpec,
    *,
    n_draws: int = 2000,
    rng: RngLike = None,
    estimator: Statistic = "hajek",
    alternative: Alternative = "two-sided",
    keep_null: bool = False,
) -> RandomizationTest:
    """Fisher's randomization test of the sharp null that treatment changes no unit's outcome.

    Under the sharp null every unit's outcome is what was observed whatever the
    assignment, so the distribution of the contrast statistic is that of the
    design's own sampler applied to fixed outcomes (Fisher 1935). The draws
    come from the design's sampler, so rerandomization rules, gaps and floors
    are respected. Rejecting "no effect at all" is not evidence of spillover
    in particular; see :func:`spillover_test`.

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
        Condition codes ``k`` and ``l`` and the mask of the units compared; the
        contrast is the test statistic.
    n_draws : int, default 2000
        Draws of the design under the null.
    rng : None, int, SeedSequence or Generator
        Default: the design's own stream for this test.
    estimator : {"hajek", "horvitz-thompson"}, default "hajek"
        The contrast estimator used as statistic.
    alternative : {"two-sided", "greater", "less", "absolute"}, default "two-sided"
        Which values count as extreme (see :func:`significance`).
    keep_null : bool, default False
        Keep the statistic of every draw in the result.

    Returns
    -------
    RandomizationTest
        The observed statistic (in the outcome's units), its p-value with
        Monte Carlo error and the number of draws.
    """
    labels = design.mapping.labels
    return contrast_test(
        design.sampler,
        design.graph,
        design.mapping,
        y,
        observed,
        probabilities,
        contrast,
        null=f"no effect at all ({labels[contrast.k]} vs {labels[contrast.l]} statistic)",
        estimator=estimator,
        n_draws=n_draws,
        rng=design.stream(Stream.FISHER_TEST) if rng is None else rng,
        alternative=alternative,
        keep_null=keep_null,
    )
