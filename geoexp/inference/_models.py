"""How one randomization test and its inverted interval are read from per-draw sums.

Two models of the effect, each fixing every potential outcome once its
parameters are given (Rosenbaum 2002): constant additive effects,
Y_i(c) = Y_i(pure control) + tau_c, and constant rate ratios,
Y_i(c) = rho_c Y_i(pure control). For both, the statistic of every draw is a
function of per-draw weighted sums that do not depend on the candidate value;
this module holds the columns whose sums are needed, the statistic and the
search for the interval. The draws themselves are summed by
:class:`geoexp.inference.SharedDraws`.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from geoexp._significance import RandomizationTest, significance
from geoexp.inference._draws import ContrastSpec, population
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


def _additive(
    design: Design,
    observed_sums: tuple[np.ndarray, np.ndarray],
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
    obs_k, obs_l = observed_sums
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


def _ratio(
    design: Design,
    observed_sums: tuple[np.ndarray, np.ndarray],
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
    obs_k, obs_l = observed_sums
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
