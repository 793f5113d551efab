"""Per-draw contrast statistics, computed with the exposure engine's scatter sums."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from geoexp._engine import Engine
from geoexp._rng import RngLike
from geoexp._significance import Alternative, RandomizationTest, significance
from geoexp.exposure import exposure_probabilities
from geoexp.inference._statistic import Statistic, contrast_statistic


@dataclass(frozen=True)
class ContrastSpec:
    """A contrast tau = mu(k) - mu(l) over the units in ``mask`` with both probabilities positive."""

    k: int
    l: int
    mask: np.ndarray


def population(probabilities: np.ndarray, spec: ContrastSpec) -> np.ndarray:
    """Boolean mask of the units in a contrast's estimand."""
    p = probabilities
    return spec.mask & (p[:, spec.k] > 0) & (p[:, spec.l] > 0)


def weight_columns(
    y: np.ndarray, probabilities: np.ndarray, spec: ContrastSpec, observed: np.ndarray | None = None
) -> np.ndarray:
    """Columns whose per-draw sums by condition give the contrast in every draw.

    Columns: y/pi_k, 1/pi_k, y/pi_l, 1/pi_l, then (when ``observed`` is given,
    for imputing sharp nulls of constant effects) 1[d = c]/pi_k and
    1[d = c]/pi_l for every condition c; all zero outside the population.
    """
    pop = population(probabilities, spec)
    pk, pl = probabilities[:, spec.k], probabilities[:, spec.l]
    n_cond = probabilities.shape[1]
    extra = 2 * n_cond if observed is not None else 0
    cols = np.zeros((y.size, 4 + extra))
    cols[pop, 0] = y[pop] / pk[pop]
    cols[pop, 1] = 1 / pk[pop]
    cols[pop, 2] = y[pop] / pl[pop]
    cols[pop, 3] = 1 / pl[pop]
    if observed is not None:
        for c in range(n_cond):
            hit = pop & (observed == c)
            cols[hit, 4 + c] = 1 / pk[hit]
            cols[hit, 4 + n_cond + c] = 1 / pl[hit]
    return cols


def statistic_from_sums(sk: np.ndarray, sl: np.ndarray, estimator: Statistic, n: int) -> np.ndarray:
    """The contrast from sums over the units in k (``sk``) and in l (``sl``), per row.

    The columns are those of :func:`weight_columns`; the statistic itself is
    :func:`geoexp.inference.contrast_statistic`, shared with the power module.
    """
    return contrast_statistic(sk[..., 0], sk[..., 1], sl[..., 2], sl[..., 3], estimator, n)


def observed_sums(cols: np.ndarray, observed: np.ndarray, code: int) -> np.ndarray:
    """Column sums over the units observed in condition ``code``."""
    return cols[observed == code].sum(axis=0)


def draw_sums(
    sampler, graph, mapping, cols: np.ndarray, n_draws: int, rng: RngLike, engine: Engine = "auto"
) -> np.ndarray:
    """Per-draw sums of every column over the units in each condition: (R, C, q)."""
    probs = exposure_probabilities(
        sampler, graph, mapping, n_draws, rng, covariates=np.asarray(cols), engine=engine
    )
    # covariates were given, so the sums are there
    assert probs.covariate_sums is not None
    return probs.covariate_sums


def contrast_test(
    sampler,
    graph,
    mapping,
    y: np.ndarray,
    observed: np.ndarray,
    probabilities: np.ndarray,
    spec: ContrastSpec,
    *,
    null: str,
    estimator: Statistic,
    n_draws: int,
    rng: RngLike,
    alternative: Alternative,
    n_focal: int = 0,
    keep_null: bool = False,
) -> RandomizationTest:
    """Randomization test of a sharp null with the contrast of ``spec`` as statistic.

    Under the null the outcomes ``y`` are fixed, so the statistic of every draw
    of ``sampler`` is computed on the same outcomes; the per-draw sums come
    from one pass of the exposure engine over the draws.
    """
    y = np.asarray(y, dtype=float)
    cols, t_obs, n = sharp_null_columns(y, observed, probabilities, spec, estimator)
    sums = draw_sums(sampler, graph, mapping, cols, n_draws, rng)
    return null_test_from_sums(
        sums, spec, t_obs, n, null, estimator, n_draws, alternative, n_focal, keep_null
    )


def sharp_null_columns(
    y: np.ndarray,
    observed: np.ndarray,
    probabilities: np.ndarray,
    spec: ContrastSpec,
    estimator: Statistic,
) -> tuple[np.ndarray, float, int]:
    """The weight columns of a sharp-null test, its observed statistic and its number of units."""
    cols = weight_columns(y, probabilities, spec)
    n = int(population(probabilities, spec).sum())
    t_obs = float(
        statistic_from_sums(
            observed_sums(cols, observed, spec.k),
            observed_sums(cols, observed, spec.l),
            estimator,
            n,
        )
    )
    return cols, t_obs, n


def null_test_from_sums(
    sums: np.ndarray,
    spec: ContrastSpec,
    t_obs: float,
    n: int,
    null: str,
    estimator: Statistic,
    n_draws: int,
    alternative: Alternative,
    n_focal: int = 0,
    keep_null: bool = False,
) -> RandomizationTest:
    """A sharp-null test from the per-draw sums (R, C, q) of its :func:`sharp_null_columns`."""
    draws = statistic_from_sums(sums[:, spec.k, :], sums[:, spec.l, :], estimator, n)
    p, mc, undefined = significance(t_obs, draws, alternative)
    return RandomizationTest(
        null=null,
        statistic=t_obs,
        p_value=p,
        mc_error=mc,
        n_draws=n_draws,
        alternative=alternative,
        n_undefined=undefined,
        n_focal=n_focal,
        null_draws=draws if keep_null else None,
    )
