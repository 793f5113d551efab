"""Per-draw contrast statistics, computed with the exposure engine's scatter sums."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from geoexp._rng import RngLike
from geoexp.errors import InputError
from geoexp.exposure import exposure_probabilities


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


def statistic_from_sums(sk: np.ndarray, sl: np.ndarray, estimator: str, n: int) -> np.ndarray:
    """The contrast from sums over the units in k (``sk``) and in l (``sl``), per row."""
    with np.errstate(invalid="ignore", divide="ignore"):
        if estimator == "hajek":
            return sk[..., 0] / sk[..., 1] - sl[..., 2] / sl[..., 3]
        if estimator == "horvitz-thompson":
            return (sk[..., 0] - sl[..., 2]) / max(n, 1)
    raise InputError(f"estimator must be 'hajek' or 'horvitz-thompson', got {estimator!r}")


def observed_sums(cols: np.ndarray, observed: np.ndarray, code: int) -> np.ndarray:
    """Column sums over the units observed in condition ``code``."""
    return cols[observed == code].sum(axis=0)


def draw_sums(
    sampler, graph, mapping, cols: np.ndarray, n_draws: int, rng: RngLike, engine: str = "auto"
) -> np.ndarray:
    """Per-draw sums of every column over the units in each condition: (R, C, q)."""
    frame = pd.DataFrame(cols, index=graph.ids)
    probs = exposure_probabilities(
        sampler, graph, mapping, n_draws, rng, covariates=frame, engine=engine
    )
    return probs.covariate_sums
