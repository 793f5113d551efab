"""Difference in means with Neyman's conservative variance, for designs without interference."""

from __future__ import annotations

import numpy as np
from scipy.stats import norm

from geoexp.errors import InputError
from geoexp.estimate._horvitz import ContrastEstimate


def difference_in_means(
    y: np.ndarray, treated: np.ndarray, *, level: float = 0.95, outcome: str = "outcome"
) -> ContrastEstimate:
    """Difference in means with Neyman's (1923) conservative standard error.

    SE = sqrt(s1^2 / n1 + s0^2 / n0) with sample variances (ddof = 1). Samii &
    Aronow (2012) show it equals the HC2 heteroskedasticity-robust standard
    error of the treatment coefficient in an OLS regression of y on the
    treatment indicator. Valid under complete randomization when units do not
    affect each other; with spillover, use the exposure-contrast estimators.

    Parameters
    ----------
    y : numpy.ndarray
        The outcome of every unit (e.g. incidents per unit in the follow-up
        period).
    treated : numpy.ndarray of bool
        The observed assignment, aligned with ``y``: True for treated units.
    level : float, default 0.95
        Confidence level of the normal-approximation interval, a probability.
    outcome : str, default "outcome"
        Name of the outcome, carried into the result.

    Returns
    -------
    ContrastEstimate
        Treated mean minus control mean (in the unit of ``y``), its standard
        error and interval, the two arm means and sizes.

    Raises
    ------
    geoexp.errors.InputError
        ``y`` and ``treated`` differ in length, or an arm has fewer than two
        units.
    """
    y = np.asarray(y, dtype=float)
    z = np.asarray(treated, dtype=bool)
    if y.shape != z.shape:
        raise InputError("y and treated must have the same length")
    y1, y0 = y[z], y[~z]
    if y1.size < 2 or y0.size < 2:
        raise InputError("each arm needs at least two units for a variance")
    est = y1.mean() - y0.mean()
    se = float(np.sqrt(y1.var(ddof=1) / y1.size + y0.var(ddof=1) / y0.size))
    q = norm.ppf(0.5 + level / 2)
    return ContrastEstimate(
        exposure="treated",
        reference="control",
        estimator="difference in means (Neyman)",
        outcome=outcome,
        estimate=float(est),
        std_error=se,
        ci_low=float(est - q * se),
        ci_high=float(est + q * se),
        mean_exposure=float(y1.mean()),
        mean_reference=float(y0.mean()),
        n_units=int(y.size),
        n_exposure=int(y1.size),
        n_reference=int(y0.size),
        n_excluded=0,
        level=level,
        joint="not used",
    )
