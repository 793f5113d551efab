"""Monte Carlo exposure probabilities from repeated draws of a design's own sampler."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Literal, Protocol

import numpy as np
import pandas as pd

from geoexp._engine import Engine
from geoexp._progress import tracked
from geoexp._rng import RngLike, as_seed_sequence
from geoexp.errors import InputError
from geoexp.exposure._kernels import scatter_counts, touched_codes_numpy
from geoexp.exposure._mapping import ExposureMapping
from geoexp.exposure._reach import BandedReach

if TYPE_CHECKING:
    from collections.abc import Iterator

    from geoexp.graph import ExposureGraph


class DrawSource(Protocol):
    """What the exposure engine needs of a sampler: chunks of draws as CSR rows of treated units."""

    @property
    def n_units(self) -> int: ...

    def iter_chunks(
        self, n_draws: int, rng: RngLike = None, *, chunk: int | None = None
    ) -> Iterator:
        """Yield objects with ``indptr`` and ``indices`` (treated positions per draw)."""
        ...


class TreatedRows(Protocol):
    """Draws as CSR rows of treated positions (``indptr``, ``indices``)."""

    @property
    def indptr(self) -> np.ndarray: ...

    @property
    def indices(self) -> np.ndarray: ...


def reach_csr(graph: ExposureGraph, mapping: ExposureMapping) -> tuple[np.ndarray, ...]:
    """CSR arrays (indptr, indices, distances) of the design's banded reach graph."""
    reach = BandedReach.of(graph, mapping)
    return reach.indptr, reach.indices, reach.distances


def condition_sums(
    draws: TreatedRows,
    reach: BandedReach,
    weights: np.ndarray,
    *,
    engine: Engine = "auto",
) -> np.ndarray:
    """Per draw and condition, the sum of ``weights`` over the units in that condition.

    ``draws`` has ``indptr`` and ``indices`` (treated positions per draw);
    ``weights`` is (n_units, q). Returns (R, K+2, q) with the pure-control
    column left at zero (it is the total minus the other columns).

    Parameters
    ----------
    draws : DrawSource or object
        The draws: ``indptr`` and ``indices`` in CSR form, the treated
        positions of draw r in ``indices[indptr[r]:indptr[r + 1]]``.
    reach : BandedReach
        Pairs of units within the outermost band, distances in metres.
    weights : numpy.ndarray
        (n_units, q) weights to sum (e.g. covariates, or ones to count units).
    engine : {"auto", "numba", "numpy"}, default "auto"
        The kernel to run; both give the same sums.

    Returns
    -------
    numpy.ndarray
        (R, K + 2, q) sums over R draws and K + 2 conditions (treated, K bands,
        pure control); the pure-control column is zero.
    """
    _, _, sums = scatter_counts(
        draws.indptr,
        draws.indices,
        reach.indptr,
        reach.indices,
        reach.distances,
        reach.edges,
        reach.n_units,
        weights,
        engine=engine,
        g_code=reach.codes,
    )
    # weights were given, so the sums are there
    assert sums is not None
    return sums


@dataclass(frozen=True, eq=False)
class ExposureProbabilities:
    """Every unit's probability of every exposure condition, estimated from R draws.

    ``counts[i, k]`` is the number of draws in which unit ``i`` was in condition
    ``k``; the probability estimate is ``counts / n_draws`` and its Monte Carlo
    standard error ``sqrt(p (1 - p) / n_draws)`` (Aronow & Samii 2017 estimate
    these from draws of the design as implemented).

    Attributes
    ----------
    ids
        Unit ids, in the graph's order.
    mapping
        The exposure mapping the conditions come from.
    counts
        Integer array (n_units, n_conditions).
    n_draws
        Number of draws R.
    seed
        Entropy of the SeedSequence the draws came from (to recompute them).
    condition_sizes, covariate_sums
        Per-draw number of units in each condition, and per-draw covariate sums
        by condition (only when covariates were given), for balance checks.
    covariate_names
        Names of the covariate columns, if any.
    """

    ids: pd.Index
    mapping: ExposureMapping
    counts: np.ndarray
    n_draws: int
    seed: object = None
    condition_sizes: np.ndarray | None = None
    covariate_sums: np.ndarray | None = None
    covariate_names: tuple[str, ...] = field(default=())

    @property
    def probabilities(self) -> np.ndarray:
        """Estimated probabilities (n_units, n_conditions)."""
        return self.counts / self.n_draws

    @property
    def mc_error(self) -> np.ndarray:
        """Monte Carlo standard errors of the probabilities."""
        p = self.probabilities
        return np.sqrt(p * (1.0 - p) / self.n_draws)

    def probability(self, condition: str | int) -> pd.Series:
        """Probability of one condition for every unit, indexed by unit id."""
        k = self.mapping.code(condition)
        return pd.Series(
            self.probabilities[:, k], index=self.ids, name=f"p_{self.mapping.codes[k]}"
        )

    def expected_counts(self) -> pd.Series:
        """Expected number of units in each condition (sum of probabilities)."""
        return pd.Series(
            self.probabilities.sum(axis=0), index=list(self.mapping.labels), name="expected_units"
        )

    def to_frame(self) -> pd.DataFrame:
        """One row per unit: ``p_<condition>`` and ``se_<condition>`` columns."""
        p, se = self.probabilities, self.mc_error
        data = {}
        for k, code in enumerate(self.mapping.codes):
            data[f"p_{code}"] = p[:, k]
        for k, code in enumerate(self.mapping.codes):
            data[f"se_{code}"] = se[:, k]
        return pd.DataFrame(data, index=self.ids)

    def positivity(self, threshold: float = 0.0) -> PositivityReport:
        """Units that fall out of each contrast because a probability is at most ``threshold``.

        For each contrast (treated vs pure control, each spillover band vs pure
        control) the estimand covers the units with both probabilities above the
        threshold. Units that can reach the exposure but (almost) never the
        reference condition are listed by id: they are the ones a user expects
        in the estimate and will not find there.
        """
        p = self.probabilities
        pc = self.mapping.pure_control
        rows = []
        for k in range(pc):
            has_k = p[:, k] > threshold
            has_ref = p[:, pc] > threshold
            both = has_k & has_ref
            rows.append(
                ContrastPositivity(
                    exposure=self.mapping.labels[k],
                    reference=self.mapping.labels[pc],
                    n_units=int(both.sum()),
                    exposure_only=tuple(self.ids[has_k & ~has_ref]),
                    n_reference_only=int((~has_k & has_ref).sum()),
                    n_neither=int((~has_k & ~has_ref).sum()),
                )
            )
        return PositivityReport(threshold=threshold, contrasts=tuple(rows))


@dataclass(frozen=True)
class ContrastPositivity:
    """Positivity of one contrast: who is in its estimand and who falls out."""

    exposure: str
    reference: str
    n_units: int
    exposure_only: tuple
    n_reference_only: int
    n_neither: int

    def __str__(self) -> str:
        lost = len(self.exposure_only)
        units = f"{self.n_units:,} unit{'' if self.n_units == 1 else 's'}"
        text = f"{self.exposure} vs {self.reference}: {units} can be in either"
        if lost:
            shown = ", ".join(map(str, self.exposure_only[:10])) + (" ..." if lost > 10 else "")
            text += f"; {lost:,} can be {self.exposure} but never {self.reference} ({shown})"
        return text


@dataclass(frozen=True)
class PositivityReport:
    """Positivity of every contrast of an exposure mapping."""

    threshold: float
    contrasts: tuple[ContrastPositivity, ...]

    def __str__(self) -> str:
        head = f"Positivity (probabilities above {self.threshold:g}):"
        return "\n".join([head, *(f"  {c}" for c in self.contrasts)])

    def to_frame(self) -> pd.DataFrame:
        """One row per contrast."""
        return pd.DataFrame(
            [
                {
                    "exposure": c.exposure,
                    "reference": c.reference,
                    "n_units": c.n_units,
                    "n_exposure_only": len(c.exposure_only),
                    "n_reference_only": c.n_reference_only,
                    "n_neither": c.n_neither,
                }
                for c in self.contrasts
            ]
        )


def exposure_probabilities(
    sampler: DrawSource,
    graph: ExposureGraph,
    mapping: ExposureMapping,
    n_draws: int = 10_000,
    rng: RngLike = None,
    *,
    covariates: pd.DataFrame | np.ndarray | None = None,
    engine: Literal["auto", "numba", "numpy"] = "auto",
) -> ExposureProbabilities:
    """Estimate every unit's exposure probabilities from ``n_draws`` draws of the sampler.

    The draws are the design's own (Aronow & Samii 2017: probabilities of the
    design as implemented, by Monte Carlo). For each draw the work is the
    treated units' neighbour lists within the outermost band: untreated units
    reached are assigned their band, and every unit not reached is a pure
    control, counted as the remainder. Memory is proportional to the number
    of units times the number of conditions, plus the graph.

    Parameters
    ----------
    sampler
        A design sampler (anything with ``iter_chunks``).
    graph
        Exposure graph over the same units, at least as wide as the outer band.
    mapping
        The exposure mapping (bands in metres).
    n_draws
        Number of Monte Carlo draws R.
    rng
        Seed or generator; the same seed gives the same probabilities.
    covariates
        Optional per-unit covariates (indexed by unit id) whose per-draw sums
        by condition are kept for balance checks; or a float array
        (n_units, q) in the graph's order of units, used without a copy
        (the randomization tests sum their weight columns this way).
    engine
        ``"numba"`` (compiled) or ``"numpy"``; both give identical counts.

    Returns
    -------
    ExposureProbabilities
    """
    if n_draws < 1:
        raise InputError(f"n_draws must be a positive number of draws, got {n_draws}")
    if sampler.n_units != graph.n:
        raise InputError(
            f"the sampler draws over {sampler.n_units} units but the graph has {graph.n}"
        )
    reach = BandedReach.of(graph, mapping)
    cov = None
    names: tuple[str, ...] = ()
    if isinstance(covariates, np.ndarray):
        if covariates.ndim != 2 or covariates.shape[0] != graph.n:
            raise InputError(
                f"covariates as an array need one row per unit ({graph.n}), got shape "
                f"{covariates.shape}"
            )
        cov = np.ascontiguousarray(covariates, dtype=np.float64)
        if not np.isfinite(cov).all():
            raise InputError("covariates have missing or infinite values")
        names = tuple(str(j) for j in range(cov.shape[1]))
    elif covariates is not None:
        aligned = covariates.reindex(graph.ids)
        missing = aligned.index[aligned.isna().any(axis=1)]
        if len(missing):
            raise InputError(
                f"covariates are missing for {len(missing)} units, e.g. {list(missing[:10])}"
            )
        cov = aligned.to_numpy(dtype=np.float64)
        names = tuple(map(str, covariates.columns))
    seq = as_seed_sequence(rng)
    counts = np.zeros((graph.n, mapping.n_conditions), dtype=np.int64)
    sizes: list[np.ndarray] = []
    sums: list[np.ndarray] = []
    seen = 0
    advance = tracked("draws of the design", n_draws)
    for chunk in sampler.iter_chunks(n_draws, seq):
        c, s, x = scatter_counts(
            chunk.indptr,
            chunk.indices,
            reach.indptr,
            reach.indices,
            reach.distances,
            reach.edges,
            graph.n,
            cov,
            engine=engine,
            g_code=reach.codes,
        )
        counts += c
        seen += chunk.indptr.size - 1
        advance(chunk.indptr.size - 1)
        if cov is not None:
            # covariates were given, so the kernel returned their sizes and sums
            assert s is not None and x is not None
            sizes.append(s)
            sums.append(x)
    if seen != n_draws:
        raise RuntimeError(f"the sampler produced {seen} draws, {n_draws} were asked for")
    counts[:, mapping.pure_control] = n_draws - counts[:, : mapping.pure_control].sum(axis=1)
    cond_sizes: np.ndarray | None = None
    cov_sums: np.ndarray | None = None
    if cov is not None:
        cond_sizes = np.concatenate(sizes)
        cov_sums = np.concatenate(sums)
        pc = mapping.pure_control
        cond_sizes[:, pc] = graph.n - cond_sizes[:, :pc].sum(axis=1)
        cov_sums[:, pc, :] = cov.sum(axis=0) - cov_sums[:, :pc, :].sum(axis=1)
    return ExposureProbabilities(
        ids=graph.ids,
        mapping=mapping,
        counts=counts,
        n_draws=n_draws,
        seed=seq.entropy,
        condition_sizes=cond_sizes,
        covariate_sums=cov_sums,
        covariate_names=names,
    )


def assign_conditions(
    graph: ExposureGraph, mapping: ExposureMapping, treated: np.ndarray
) -> np.ndarray:
    """Exposure condition codes of every unit under one assignment.

    ``treated`` holds the positions (or a boolean mask) of the treated units.
    Returns an int8 array of codes: 0 treated, k for spillover band k, and
    ``mapping.pure_control`` for the rest.

    Parameters
    ----------
    graph : ExposureGraph
        Distances (metres) between units within the outermost band.
    mapping : ExposureMapping
        The exposure conditions (treated, distance bands, pure control).
    treated : numpy.ndarray
        Positions of the treated units, or a boolean mask over every unit.

    Returns
    -------
    numpy.ndarray of int8
        One code per unit (see above).
    """
    treated = np.asarray(treated)
    if treated.dtype == bool:
        treated = np.flatnonzero(treated)
    reach = BandedReach.of(graph, mapping)
    _, unit, cond = touched_codes_numpy(
        np.array([0, treated.size], dtype=np.int64),
        treated.astype(np.int64),
        reach.indptr,
        reach.indices,
        reach.codes,
        graph.n,
        reach.n_conditions,
    )
    out = np.full(graph.n, mapping.pure_control, dtype=np.int8)
    out[unit] = cond
    out[treated] = 0
    return out
