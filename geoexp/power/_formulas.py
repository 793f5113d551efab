"""Closed-form sample sizes: a first guide before simulating the design itself."""

from __future__ import annotations

import math

from scipy.stats import norm

from geoexp.errors import InputError


def negative_binomial_sample_size(
    mu0: float,
    rate_ratio: float,
    dispersion: float,
    alpha: float = 0.05,
    power: float = 0.8,
) -> int:
    """Units per arm to detect a rate ratio between two negative binomial arms.

    Zhu & Lakkis (2014), *Statistics in Medicine* 33(3), for the Wald test of
    the log rate ratio with NB2 counts (Var = mu + alpha mu^2) and equal arms:

        n = (z_{1-a/2} + z_{1-b})^2 (1/mu0 + 1/mu1 + 2 alpha) / (ln RR)^2,

    with mu1 = RR mu0, rounded up. This is only a first guide for a place-based
    trial: it ignores spillover between units, the design's restrictions
    (buffers, blocks, eligibility, rerandomization) and the randomization test
    the analysis uses. Check the design itself with :func:`simulate_power`.

    Parameters
    ----------
    mu0
        Expected count per unit in the control arm over the outcome period.
    rate_ratio
        mu1 / mu0 to detect (0.8 is a 20% reduction).
    dispersion
        NB2 dispersion alpha >= 0 (0: Poisson).
    alpha
        Two-sided significance level.
    power
        Power wanted, 1 - beta.

    Returns
    -------
    int
        Units per arm.
    """
    checks = (
        (mu0 > 0 and math.isfinite(mu0), f"mu0 must be a positive count, got {mu0!r}"),
        (
            rate_ratio > 0 and math.isfinite(rate_ratio) and rate_ratio != 1,
            f"rate_ratio must be positive and not 1, got {rate_ratio!r}",
        ),
        (
            dispersion >= 0 and math.isfinite(dispersion),
            f"dispersion must be >= 0, got {dispersion!r}",
        ),
        (0 < alpha < 1, f"alpha must lie strictly between 0 and 1, got {alpha!r}"),
        (0 < power < 1, f"power must lie strictly between 0 and 1, got {power!r}"),
    )
    for ok, message in checks:
        if not ok:
            raise InputError(message)
    mu1 = rate_ratio * mu0
    z = norm.ppf(1 - alpha / 2) + norm.ppf(power)
    n = z**2 * (1 / mu0 + 1 / mu1 + 2 * dispersion) / math.log(rate_ratio) ** 2
    # a value a hair above a whole number from rounding must not add a unit
    return int(math.ceil(n - 1e-9))
