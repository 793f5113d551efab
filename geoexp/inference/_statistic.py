"""The per-draw test statistic shared by every randomization test and by the power module."""

from __future__ import annotations

from typing import Literal

import numpy as np

from geoexp.errors import InputError

Statistic = Literal["hajek", "horvitz-thompson"]


def contrast_statistic(
    num_k: np.ndarray,
    den_k: np.ndarray,
    num_l: np.ndarray,
    den_l: np.ndarray,
    estimator: Statistic = "hajek",
    n_units: int | None = None,
) -> np.ndarray:
    """The contrast tau = mu(k) - mu(l) from weighted sums, for any number of draws at once.

    ``num_c`` is sum over the units in condition c of y_i / pi_i(c) and
    ``den_c`` the sum of 1 / pi_i(c) (arrays of any common shape: one entry per
    draw, per simulated trial, per candidate effect). The Hajek contrast is
    num_k / den_k - num_l / den_l; Horvitz–Thompson divides the numerators by
    the number of units in the estimand instead (Aronow & Samii 2017). A draw
    with no unit in a condition gives NaN (Hajek), which the significance
    routine counts as extreme.

    This one function computes the statistic for the analysis's tests
    (:mod:`geoexp.inference`), their inversion into intervals and every
    simulated trial of :mod:`geoexp.power`, so power is the power of the very
    test the analysis runs.

    Parameters
    ----------
    num_k, den_k : numpy.ndarray
        Weighted sums of the exposure side: sum of y_i / pi_i(k) and of 1 / pi_i(k).
    num_l, den_l : numpy.ndarray
        The same sums of the reference side.
    estimator : {"hajek", "horvitz-thompson"}
        Ratio (Hajek) or plain (Horvitz-Thompson) means.
    n_units : int, optional
        Number of units in the estimand; needed for Horvitz-Thompson.

    Returns
    -------
    numpy.ndarray
        The contrast, in the outcome's units, with the sums' common shape.

    Raises
    ------
    geoexp.errors.InputError
        An unknown estimator.
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        if estimator == "hajek":
            return np.asarray(num_k) / den_k - np.asarray(num_l) / den_l
        if estimator == "horvitz-thompson":
            return (np.asarray(num_k) - num_l) / max(int(n_units or 0), 1)
    raise InputError(f"estimator must be 'hajek' or 'horvitz-thompson', got {estimator!r}")
