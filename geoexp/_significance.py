"""The one significance routine shared by every randomization test."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
import pandas as pd

from geoexp.errors import InputError

Alternative = Literal["two-sided", "greater", "less", "absolute"]
ALTERNATIVES = ("two-sided", "greater", "less", "absolute")


def significance(
    observed: float | np.ndarray,
    null: np.ndarray,
    alternative: Alternative = "two-sided",
    *,
    exact: bool = False,
) -> tuple:
    """P-value of ``observed`` against draws of the statistic under the null.

    With R sampled draws, a one-sided p-value is (1 + M) / (1 + R) where M
    counts draws at least as extreme as the observed value, so p is never
    below 1 / (R + 1) (the observed assignment is one draw of the design).
    With ``exact=True`` the null holds every assignment of the design, the
    observed one included, and p = M / R.

    Alternatives:

    - ``"greater"``: M = #{T_r >= t}; ``"less"``: M = #{T_r <= t}.
    - ``"two-sided"`` (default): the equal-tailed rule
      p = min(1, 2 min(P(T >= t), P(T <= t))), each side by the rule above.
      It stays unbiased when the null distribution is not centred at zero
      (a Hajek contrast's randomization distribution usually is not), so its
      rejection rate under any shift is at least alpha up to Monte Carlo error
      (Lehmann & Romano 2005, section 5.8 [equal-tailed tests]; Rosenbaum 2002,
      ch. 2).
    - ``"absolute"``: M = #{|T_r| >= |t|}, the rule of comparing absolute
      values. Kept for comparison only: when the null is not centred at zero
      it penalises effects in one direction (its power can fall below alpha).

    Draws where the statistic is undefined (NaN, e.g. an empty condition)
    count as extreme on every side, which keeps the test valid.

    Vectorised: ``observed`` may be an array of shape S and ``null`` of shape
    S + (R,) (one row of draws per observed value), or ``null`` of shape (R,)
    shared by every observed value.

    Parameters
    ----------
    observed : float or numpy.ndarray
        The observed statistic, a scalar or an array of shape S.
    null : numpy.ndarray
        Draws of the statistic under the null: shape (R,) or S + (R,).
    alternative : {"two-sided", "greater", "less", "absolute"}, default "two-sided"
        Which values count as extreme (see above).
    exact : bool, default False
        True when ``null`` enumerates every assignment of the design, the
        observed one included.

    Returns
    -------
    (p_value, mc_error, n_undefined)
        Floats for a scalar ``observed``, arrays of shape S otherwise.
        ``mc_error`` is sqrt(p (1 - p) / R), zero for an exact enumeration.
    """
    scalar = np.ndim(observed) == 0
    obs = np.asarray(observed, dtype=float)
    null = np.asarray(null, dtype=float)
    r = null.shape[-1] if null.ndim else 0
    if r == 0:
        raise InputError("a randomization test needs at least one draw of the null")
    if scalar and not np.isfinite(obs):
        raise InputError("the observed statistic is undefined (an empty condition?)")
    if alternative not in ALTERNATIVES:
        raise InputError(
            f"alternative must be two-sided, greater, less or absolute, got {alternative!r}"
        )
    t_obs = obs[..., None]
    undefined = ~np.isfinite(null)
    n_undefined = undefined.sum(axis=-1)
    # a tolerance so that ties lost to rounding still count as ties (conservative)
    tol = 1e-9 * np.maximum(1.0, np.abs(t_obs))

    def count(extreme: np.ndarray) -> np.ndarray:
        return (extreme & ~undefined).sum(axis=-1) + n_undefined

    def rule(m: np.ndarray) -> np.ndarray:
        return m / r if exact else (1 + m) / (1 + r)

    with np.errstate(invalid="ignore"):
        if alternative == "greater":
            p = rule(count(null >= t_obs - tol))
        elif alternative == "less":
            p = rule(count(null <= t_obs + tol))
        elif alternative == "absolute":
            p = rule(count(np.abs(null) >= np.abs(t_obs) - tol))
        else:
            upper = rule(count(null >= t_obs - tol))
            lower = rule(count(null <= t_obs + tol))
            p = np.minimum(1.0, 2 * np.minimum(upper, lower))
    p = np.where(np.isfinite(obs), p, np.nan)
    mc = np.zeros_like(p) if exact else np.sqrt(p * (1 - p) / r)
    if scalar:
        return float(p), float(mc), int(n_undefined)
    return p, mc, np.broadcast_to(n_undefined, p.shape)


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
        "two-sided" (equal-tailed), "greater", "less" or "absolute".
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
