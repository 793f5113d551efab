"""The one significance routine shared by every randomization test."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
import pandas as pd

from geoexp.errors import InputError

Alternative = Literal["two-sided", "greater", "less"]


def significance(
    observed: float,
    null: np.ndarray,
    alternative: Alternative = "two-sided",
    *,
    exact: bool = False,
) -> tuple[float, float, int]:
    """P-value of ``observed`` against draws of the statistic under the null.

    With R sampled draws, p = (1 + M) / (1 + R) where M counts draws at least as
    extreme as the observed value, so p is never below 1 / (R + 1) (the
    observed assignment is one draw of the design). With ``exact=True`` the
    null holds every assignment of the design, the observed one included, and
    p = M / R. "two-sided" compares absolute values, "greater" large values,
    "less" small ones. Draws where the statistic is undefined (NaN, e.g. an
    empty condition) count as extreme, which keeps the test valid.

    Returns
    -------
    (p_value, mc_error, n_undefined)
        ``mc_error`` is sqrt(p (1 - p) / R), zero for an exact enumeration.
    """
    null = np.asarray(null, dtype=float)
    r = null.size
    if r == 0:
        raise InputError("a randomization test needs at least one draw of the null")
    if not np.isfinite(observed):
        raise InputError("the observed statistic is undefined (an empty condition?)")
    if alternative == "two-sided":
        t_obs, t = abs(observed), np.abs(null)
    elif alternative == "greater":
        t_obs, t = observed, null
    elif alternative == "less":
        t_obs, t = -observed, -null
    else:
        raise InputError(f"alternative must be two-sided, greater or less, got {alternative!r}")
    # a tolerance so that ties lost to rounding still count as ties (conservative)
    tol = 1e-9 * max(1.0, abs(t_obs))
    undefined = ~np.isfinite(t)
    extreme = int((t[~undefined] >= t_obs - tol).sum() + undefined.sum())
    p = extreme / r if exact else (1 + extreme) / (1 + r)
    mc = 0.0 if exact else float(np.sqrt(p * (1 - p) / r))
    return float(p), mc, int(undefined.sum())


@dataclass(frozen=True, eq=False)
class RandomizationTest:
    """Result of a randomization test.

    Attributes
    ----------
    null
        The null hypothesis in words.
    statistic
        The observed value of the test statistic.
    p_value, mc_error
        P-value and its Monte Carlo standard error.
    n_draws
        Number of draws of the design under the null.
    alternative
        "two-sided", "greater" or "less".
    n_undefined
        Draws in which the statistic was undefined (counted as extreme).
    n_focal
        Focal units used (conditional tests), else 0.
    null_draws
        The statistic in each draw, when kept.
    """

    null: str
    statistic: float
    p_value: float
    mc_error: float
    n_draws: int
    alternative: str
    n_undefined: int = 0
    n_focal: int = 0
    null_draws: np.ndarray | None = None

    def __str__(self) -> str:
        focal = f", {self.n_focal} focal units" if self.n_focal else ""
        return (
            f"{self.null}: statistic {self.statistic:+.4f}, p = {self.p_value:.4f} "
            f"(MC error {self.mc_error:.4f}; {self.n_draws} draws{focal}, {self.alternative})"
        )

    def to_frame(self) -> pd.DataFrame:
        """One-row frame (without the null draws)."""
        row = {k: v for k, v in self.__dict__.items() if k != "null_draws"}
        return pd.DataFrame([row]).set_index("null")
