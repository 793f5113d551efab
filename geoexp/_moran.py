"""Moran's I of a variable over the exposure graph, with a permutation test.

A statistic read off the graph's structure: the graph stays structure only
(:class:`geoexp.graph.ExposureGraph`). The statistic sits just above the graph,
below the design check that reports it; ``geoexp.inference.moran`` is its
public name.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from geoexp._rng import RngLike, as_generator
from geoexp._significance import significance
from geoexp.errors import InputError

if TYPE_CHECKING:
    from geoexp.graph import ExposureGraph


@dataclass(frozen=True)
class MoranResult:
    """Moran's I with its expectation under no autocorrelation and a permutation p-value."""

    statistic: float
    expected: float
    p_value: float
    mc_error: float
    n_draws: int
    distance: float
    n_units: int
    n_isolated: int

    def __str__(self) -> str:
        return (
            f"Moran's I = {self.statistic:+.3f} among units within {self.distance:g} m "
            f"(expected {self.expected:+.4f} without spatial autocorrelation; permutation "
            f"p = {self.p_value:.4f} ± {self.mc_error:.4f}, {self.n_draws:,} draws; "
            f"{self.n_isolated:,} of {self.n_units:,} units have no neighbour and are left out)"
        )


def moran(
    graph: ExposureGraph,
    values,
    *,
    distance: float | None = None,
    permutations: int = 999,
    rng: RngLike = None,
) -> MoranResult:
    """Moran's I of ``values`` (one per unit) among units within ``distance`` metres.

    Moran (1950) I with binary weights d_ij <= distance, row-standardised
    (Cliff & Ord 1981). Units without a neighbour are left out (their row
    cannot be standardised). The p-value is two-sided, from random
    permutations of the values over the units, through the project's one
    significance routine.

    Parameters
    ----------
    graph : ExposureGraph
        The units' neighbour pairs and distances.
    values : array-like
        One finite number per unit of the graph.
    distance : float, optional
        Neighbour distance in metres; defaults to the graph's ``max_distance``.
    permutations : int
        Random permutations of the values for the p-value.
    rng : None, int, SeedSequence or Generator
        Randomness of the permutations.

    Returns
    -------
    MoranResult
    """
    d = graph.max_distance if distance is None else float(distance)
    if d > graph.max_distance + 1e-9:
        raise InputError(f"the graph holds pairs up to {graph.max_distance:g} m, not {d:g} m")
    near = graph.within(min(d, graph.max_distance))
    indptr, indices = near.indptr, near.indices
    distance, permutations = d, int(permutations)
    y = np.asarray(values, dtype=float)
    n = indptr.size - 1
    if y.shape != (n,):
        raise InputError(f"values must have one number per unit ({n}), got shape {y.shape}")
    if not np.isfinite(y).all():
        raise InputError("values must be finite numbers for every unit")
    rows = np.repeat(np.arange(n), np.diff(indptr))
    cols = indices.astype(np.int64)
    degree = np.bincount(rows, minlength=n)
    has = degree > 0
    if has.sum() < 3:
        raise InputError(f"fewer than 3 units have a neighbour within {distance:g} m")
    # restrict to units with neighbours, and to pairs among them
    inside = has[cols]
    rows, cols = rows[inside], cols[inside]
    where = np.full(n, -1)
    where[has] = np.arange(has.sum())
    rows, cols = where[rows], where[cols]
    y = y[has]
    m = y.size
    deg = np.bincount(rows, minlength=m)
    w = 1.0 / deg[rows]
    ok = deg > 0
    s0 = float(ok.sum())  # row-standardised: each non-empty row sums to one

    def statistic(z: np.ndarray) -> np.ndarray:
        # z: (m,) or (m, k) centred values
        lag = np.zeros_like(z)
        np.add.at(lag, rows, w[:, None] * z[cols] if z.ndim == 2 else w * z[cols])
        num = (z * lag).sum(axis=0)
        den = (z * z).sum(axis=0)
        return m / s0 * num / den

    z = y - y.mean()
    if not (z * z).sum() > 0:
        raise InputError("values are constant; Moran's I is undefined")
    observed = float(statistic(z))
    gen = as_generator(rng)
    block = max(1, min(permutations, 2_000_000 // max(m, 1)))
    null = []
    for start in range(0, permutations, block):
        k = min(block, permutations - start)
        perm = gen.permuted(np.repeat(z[:, None], k, axis=1), axis=0)
        null.append(statistic(perm))
    null_draws = np.concatenate(null) if null else np.zeros(0)
    expected = -1.0 / (m - 1)
    p, mc, _ = significance(observed - expected, null_draws - expected, "two-sided")
    return MoranResult(
        statistic=observed,
        expected=expected,
        p_value=p,
        mc_error=mc,
        n_draws=permutations,
        distance=float(distance),
        n_units=n,
        n_isolated=int((~has).sum()),
    )
