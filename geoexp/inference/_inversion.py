"""Intervals for a constant additive effect by inverting randomization tests."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from geoexp._rng import RngLike
from geoexp.inference._draws import ContrastSpec, draw_sums, weight_columns
from geoexp.inference._significance import significance
from geoexp.inference._statistic import contrast_statistic

if TYPE_CHECKING:
    from geoexp.design import Design


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

    For each candidate tau_k (the other conditions' effects held at ``effects``,
    usually their point estimates), the sharp null fixes every potential
    outcome: Y_i(pure control) = Y_i - tau_{d_i}. The test statistic
    (estimate minus tau_k) is recomputed for every draw of the design, and the
    interval is the set of tau_k that the equal-tailed two-sided test at 1 - level (the
    one significance routine) does not
    reject (Rosenbaum 2002, test inversion). Because the statistic is linear in
    the effects for fixed per-draw sums, one pass over the draws serves every
    candidate. Returns (low, high); an end is infinite where no rejection is
    found within a wide search range.
    """
    y = np.asarray(y, dtype=float)
    if estimator != "hajek":
        raise ValueError("test inversion is implemented for the Hajek statistic")
    k, l = contrast.k, contrast.l
    n_cond = probabilities.shape[1]
    cols = weight_columns(y, probabilities, contrast, observed)
    rng = design.stream(10 + k) if rng is None else rng
    sums = draw_sums(design.sampler, design.graph, design.mapping, cols, n_draws, rng)
    obs_k = cols[observed == k].sum(axis=0)
    obs_l = cols[observed == l].sum(axis=0)
    tau_hat = obs_k[0] / obs_k[1] - obs_l[2] / obs_l[3]
    effects = np.asarray(effects, dtype=float).copy()

    def pvalues(grid: np.ndarray) -> np.ndarray:
        tau = np.repeat(effects[None, :], grid.size, axis=0)
        tau[:, k] = grid
        tau[:, n_cond - 1] = 0.0  # the reference condition of the model
        sk, sl = sums[:, k, :], sums[:, l, :]
        # A_k^r = sum_{D=k} y/pi_k - sum_c tau_c sum_{D=k, d=c} 1/pi_k  (R x G)
        a_k = sk[:, [0]] - sk[:, 4 : 4 + n_cond] @ tau.T
        a_l = sl[:, [2]] - sl[:, 4 + n_cond : 4 + 2 * n_cond] @ tau.T
        stat = contrast_statistic(a_k, sk[:, [1]], a_l, sl[:, [3]])
        # the same significance routine (equal-tailed two-sided) as every other test
        return significance(tau_hat - grid, stat.T, "two-sided")[0]

    alpha = 1 - level
    half = max(8 * scale, 1e-6)
    for _ in range(4):
        grid = np.linspace(center - half, center + half, 161)
        p = pvalues(grid)
        inside = p > alpha
        if inside[0] or inside[-1]:
            half *= 4
            continue
        break
    if not inside.any():
        return (float(tau_hat), float(tau_hat))
    idx = np.flatnonzero(inside)
    lo_i, hi_i = idx[0], idx[-1]

    def refine(a: float, b: float, inside_at_b: bool) -> float:
        # bisection between an outside point a and an inside point b
        for _ in range(40):
            mid = (a + b) / 2
            if (pvalues(np.array([mid]))[0] > alpha) == inside_at_b:
                b = mid
            else:
                a = mid
        return (a + b) / 2

    low = -np.inf if lo_i == 0 else refine(grid[lo_i - 1], grid[lo_i], True)
    high = np.inf if hi_i == grid.size - 1 else refine(grid[hi_i + 1], grid[hi_i], True)
    return float(low), float(high)
