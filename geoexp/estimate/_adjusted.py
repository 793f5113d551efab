"""Regression-adjusted weighting estimator with a pre-period covariate (Lin 2013 style)."""

from __future__ import annotations

import numpy as np

from geoexp.errors import InputError


def adjusted_contrast(
    y: np.ndarray,
    x: np.ndarray,
    observed: np.ndarray,
    probabilities: np.ndarray,
    k: int,
    l: int,
    units: np.ndarray,
) -> float:
    """Covariate-adjusted contrast tau = mu(k) - mu(l), both sides' means at the mean covariate.

    Lin (2013) adjusts a randomized comparison by regressing the outcome on the
    treatment, the centred covariate and their interaction; with unequal
    probabilities the same regression is weighted by 1/pi of each unit's
    observed condition. Its treatment coefficient equals, side by side, the
    weighted least-squares line of y on x within each condition evaluated at
    the mean covariate of all units of the estimand:
    mu(c) = ybar_w(c) + b_c (xbar - xbar_w(c)), with b_c the weighted slope.
    Here x is the unit's pre-period count and y its post-period count.

    Parameters
    ----------
    y : numpy.ndarray
        Outcome per unit (post-period incidents).
    x : numpy.ndarray
        Covariate per unit (pre-period incidents), one per unit.
    observed : numpy.ndarray
        Observed exposure condition code of every unit.
    probabilities : numpy.ndarray
        (n_units, n_conditions) exposure probabilities of the design.
    k, l : int
        Condition codes of the exposure and the reference side.
    units : numpy.ndarray
        Boolean mask of the estimand's units.

    Returns
    -------
    float
        The adjusted contrast in the outcome's units (incidents per unit);
        NaN when a side has no unit.
    """
    y = np.asarray(y, dtype=float)
    x = np.asarray(x, dtype=float)
    units = np.asarray(units, dtype=bool)
    if y.shape != x.shape:
        raise InputError("the outcome and the covariate need one value per unit")
    xbar = x[units].mean() if units.any() else np.nan
    means = []
    for c in (k, l):
        hit = units & (observed == c)
        w = 1 / probabilities[hit, c]
        if w.size == 0:
            return float("nan")
        sw = w.sum()
        mx, my = (w * x[hit]).sum() / sw, (w * y[hit]).sum() / sw
        sxx = (w * (x[hit] - mx) ** 2).sum()
        slope = (w * (x[hit] - mx) * (y[hit] - my)).sum() / sxx if sxx > 0 else 0.0
        means.append(my + slope * (xbar - mx))
    return float(means[0] - means[1])
