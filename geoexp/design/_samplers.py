"""Randomization samplers: definite random procedures that draw many assignments at once.

Each sampler is a frozen dataclass describing one random procedure. The
design's probabilities (of treatment, of each exposure condition, joint) are
whatever that procedure implies; geoexp estimates them by Monte Carlo from
many draws of the very same sampler, and randomization tests redraw from it.

Reproducibility: ``rng`` is normalised once to a ``numpy.random.SeedSequence``;
chunk k of the draws uses the child of that sequence with key k (the child
``SeedSequence.spawn`` would give first, derived without advancing the
parent's spawn counter), so the result depends only on (seed, n_draws, chunk
size), and passing the same SeedSequence twice repeats the draws. Default
chunk sizes are fixed constants, so ``draw_many(R, seed)`` is the same on
every machine.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
import pandas as pd
import scipy.linalg
import scipy.sparse
import scipy.stats

from geoexp._rng import child_sequence
from geoexp.design._chunked import (
    _Chunked,
    _factorize,
    _generators,
    _layer,
    _members,
    _quota_array,
    _readonly,
    _subset_matrix,
)
from geoexp.design._draws import Draws
from geoexp.design._saturation import SaturationSampler
from geoexp.design._separated import SeparatedSampler
from geoexp.errors import DesignError, InfeasibleDesignError, InputError, describe_rows

__all__ = [
    "CompleteSampler",
    "BlockedSampler",
    "SeparatedSampler",
    "SaturationSampler",
    "Rerandomized",
]


@dataclass(frozen=True, eq=False)
class CompleteSampler(_Chunked):
    """Complete randomization: exactly ``n_treated`` of the eligible units are treated.

    Every subset of that size is equally likely. Each draw takes the first
    ``n_treated`` distinct values of an iid uniform sequence over the eligible
    units (a uniformly random subset); when more than half are treated the
    controls are chosen instead. The design's probabilities are whatever this
    procedure implies and are estimated by Monte Carlo.

    Parameters
    ----------
    n_units : int
        Units in the full layer (draws are positions ``0..n_units-1``).
    eligible : numpy.ndarray or None
        Positions that may be treated (None: all units).
    n_treated : int
        Number of treated units m, ``1 <= m <= len(eligible)``.
    """

    n_units: int
    eligible: np.ndarray | None
    n_treated: int

    def __post_init__(self) -> None:
        n_units, eligible = _layer(self.n_units, self.eligible)
        object.__setattr__(self, "n_units", n_units)
        object.__setattr__(self, "eligible", eligible)
        m = self.n_treated
        if isinstance(m, bool) or not isinstance(m, (int, np.integer)) or m < 1:
            raise DesignError(f"n_treated must be a whole number >= 1, got {m!r}")
        if m > eligible.size:
            raise InfeasibleDesignError(
                f"n_treated = {m} but only {eligible.size} units are eligible; "
                f"choose at most {eligible.size}"
            )
        object.__setattr__(self, "n_treated", int(m))

    def _draw_chunk(self, n_draws: int, seed: np.random.SeedSequence) -> Draws:
        main, extension = _generators(seed, 2)
        local = _subset_matrix(main, extension, self.positions.size, self.n_treated, n_draws)
        return Draws.from_rows(self.positions[local], self.n_units)

    def describe(self) -> str:
        """Return a plain sentence describing the procedure."""
        return (
            f"Complete randomization: {self.n_treated:,} of {self.positions.size:,} eligible "
            "units are treated, every such set equally likely."
        )


@dataclass(frozen=True, eq=False)
class BlockedSampler(_Chunked):
    """Blocked randomization: complete randomization within each block.

    Block b gets exactly ``quotas[b]`` treated units, every such set equally
    likely and blocks independent, so a unit's treatment probability is its
    block's quota over its block's size. Probabilities are those of this
    procedure, estimated by Monte Carlo.

    Parameters
    ----------
    n_units : int
        Units in the full layer.
    eligible : numpy.ndarray or None
        Positions that may be treated (None: all units).
    blocks : numpy.ndarray
        Block label of each eligible unit (same order as ``eligible``).
    quotas : mapping
        Block label -> number treated in that block (0 allowed).
    """

    n_units: int
    eligible: np.ndarray | None
    blocks: np.ndarray
    quotas: Mapping[Any, int]

    block_labels: np.ndarray = field(init=False, repr=False)
    block_codes: np.ndarray = field(init=False, repr=False)
    block_quota: np.ndarray = field(init=False, repr=False)
    _members: list = field(init=False, repr=False)

    def __post_init__(self) -> None:
        n_units, eligible = _layer(self.n_units, self.eligible)
        codes, labels = _factorize(self.blocks, eligible.size, "blocks")
        sizes = np.bincount(codes, minlength=labels.size)
        quota = _quota_array(self.quotas, labels, sizes)
        object.__setattr__(self, "n_units", n_units)
        object.__setattr__(self, "eligible", eligible)
        object.__setattr__(self, "blocks", _readonly(np.array(self.blocks)))
        object.__setattr__(self, "quotas", dict(self.quotas))
        object.__setattr__(self, "block_labels", _readonly(labels))
        object.__setattr__(self, "block_codes", _readonly(codes))
        object.__setattr__(self, "block_quota", _readonly(quota))
        object.__setattr__(self, "_members", _members(codes, labels.size))

    @property
    def n_treated(self) -> int:
        """Total treated units per draw (the sum of the quotas)."""
        return int(self.block_quota.sum())

    def _draw_chunk(self, n_draws: int, seed: np.random.SeedSequence) -> Draws:
        main, extension = _generators(seed, 2)
        parts = []
        # one pass per block, each vectorised across the chunk's draws
        for members, quota in zip(self._members, self.block_quota.tolist(), strict=True):
            if quota:
                local = _subset_matrix(main, extension, members.size, quota, n_draws)
                parts.append(members[local])
        local = np.concatenate(parts, axis=1)
        return Draws.from_rows(self.positions[local], self.n_units)

    def describe(self) -> str:
        """Return a plain sentence describing the procedure."""
        return (
            f"Blocked randomization: {self.n_treated:,} of {self.positions.size:,} eligible units "
            f"treated, a fixed number in each of {self.block_labels.size:,} blocks, every set "
            "within a block equally likely."
        )


@dataclass(frozen=True, eq=False)
class Rerandomized(_Chunked):
    """Rerandomization on covariate balance (Morgan & Rubin, 2012).

    Draws from ``base`` are kept only when the Mahalanobis distance
    ``M = n p (1 - p) (xT - xC)' S^-1 (xT - xC)`` between treated and control
    covariate means is at most ``a = chi2.ppf(acceptance, K)``, with n the
    number of eligible units, p = m / n and S the sample covariance of the
    covariates over the eligible units. The design is the base design
    conditioned on M <= a; its probabilities are estimated by Monte Carlo
    from this sampler, and the observed assignment (``draw``) is the first
    accepted draw of the same procedure. Accepted draws carry their M in
    ``Draws.extra["mahalanobis"]``.

    Parameters
    ----------
    base : sampler
        A sampler with a fixed number treated (``n_treated``).
    covariates : array-like
        (n_eligible, K) covariates in the order of ``base.eligible``; a
        DataFrame's columns name them.
    acceptance : float
        Planned acceptance probability p_a in (0, 1]; the threshold is its
        chi-square quantile.
    covariate_names : sequence of str, optional
        Covariate names for messages (default: a DataFrame's columns, else
        "column j").
    """

    base: Any
    covariates: Any
    acceptance: float
    covariate_names: Sequence[str] | None = None

    # the layer and eligible positions of the base sampler
    n_units: int = field(init=False, repr=False)
    eligible: np.ndarray | None = field(init=False, repr=False)
    threshold: float = field(init=False, repr=False)
    _chol: np.ndarray = field(init=False, repr=False)
    _local: np.ndarray = field(init=False, repr=False)

    def __post_init__(self) -> None:
        base = self.base
        if not isinstance(base, _Chunked) or not isinstance(getattr(base, "n_treated", None), int):
            raise DesignError(
                "rerandomization needs a base sampler with a fixed number of treated units "
                "(complete, blocked or kept-apart)"
            )
        object.__setattr__(self, "n_units", base.n_units)
        object.__setattr__(self, "eligible", base.positions)
        names = self.covariate_names
        if isinstance(self.covariates, pd.DataFrame) and names is None:
            names = [str(c) for c in self.covariates.columns]
        x = np.array(self.covariates, dtype=np.float64)
        if x.ndim == 1:
            x = x[:, None]
        n_e = base.positions.size
        if x.ndim != 2 or x.shape[0] != n_e:
            raise InputError(
                f"covariates must have one row per eligible unit ({n_e}), got shape {x.shape}"
            )
        k = x.shape[1]
        names = [str(v) for v in names] if names is not None else [f"column {j}" for j in range(k)]
        if len(names) != k:
            raise InputError(f"covariate_names must give {k} names, got {len(names)}")
        bad_rows = np.flatnonzero(~np.isfinite(x).all(axis=1))
        if bad_rows.size:
            raise InputError(
                "covariates are missing or infinite for eligible units at positions "
                + describe_rows(base.positions[bad_rows].tolist())
            )
        acceptance = float(self.acceptance)
        if not 0 < acceptance <= 1:
            raise DesignError(f"acceptance must be in (0, 1], got {self.acceptance!r}")
        object.__setattr__(self, "covariates", _readonly(x))
        object.__setattr__(self, "covariate_names", tuple(names))
        object.__setattr__(self, "acceptance", acceptance)
        object.__setattr__(self, "_chol", _readonly(self._cholesky(x, names)))
        object.__setattr__(self, "threshold", float(scipy.stats.chi2.ppf(acceptance, k)))
        local = np.full(base.n_units, -1, dtype=np.int64)
        local[base.positions] = np.arange(n_e)
        object.__setattr__(self, "_local", _readonly(local))

    @staticmethod
    def _cholesky(x: np.ndarray, names: list[str]) -> np.ndarray:
        spread = x.std(axis=0, ddof=1) if x.shape[0] > 1 else np.zeros(x.shape[1])
        scale = np.maximum(np.abs(x).max(axis=0), 1.0)
        constant = np.flatnonzero(spread <= 1e-12 * scale)
        if constant.size:
            raise DesignError(
                "the covariance of the covariates is singular: constant over the eligible units: "
                + describe_rows([names[j] for j in constant])
            )
        corr = np.atleast_2d(np.corrcoef(x, rowvar=False))
        eigval, eigvec = np.linalg.eigh(corr)
        null = eigval < 1e-10 * max(eigval.max(), 1.0)
        if null.any():
            involved = np.flatnonzero((np.abs(eigvec[:, null]) > 1e-6).any(axis=1))
            raise DesignError(
                "the covariance of the covariates is singular: these covariates are collinear "
                "(a combination of them is constant): "
                + describe_rows([names[j] for j in involved])
                + "; drop one of them"
            )
        return np.linalg.cholesky(np.atleast_2d(np.cov(x, rowvar=False)))

    @property
    def n_treated(self) -> int:
        """Number treated per draw."""
        return self.base.n_treated

    def mahalanobis(self, draws: Draws) -> np.ndarray:
        """Return Morgan & Rubin's M for each draw of ``draws`` (draws of the base design).

        Parameters
        ----------
        draws : Draws
            Assignments over the same layer.

        Returns
        -------
        numpy.ndarray
            float64 (R,).
        """
        x = self.covariates
        n = x.shape[0]
        local = self._local[draws.indices]
        if (local < 0).any():
            raise InputError("draws treat units that are not eligible for this design")
        z = scipy.sparse.csr_array(
            (np.ones(local.size), local, draws.indptr), shape=(draws.n_draws, n)
        )
        m = draws.counts.astype(np.float64)[:, None]
        sum_t = z @ x
        diff = sum_t / m - (x.sum(axis=0) - sum_t) / (n - m)
        w = scipy.linalg.solve_triangular(self._chol, diff.T, lower=True)
        p = m[:, 0] / n
        return n * p * (1 - p) * np.sum(w * w, axis=0)

    def _draw_chunk(self, n_draws: int, seed: np.random.SeedSequence) -> Draws:
        kept: list[Draws] = []
        got = tried = 0
        # memory cap per base batch: about 2e7 treated positions
        cap = max(64, 20_000_000 // max(self.n_treated, 1))
        while got < n_draws:
            need = n_draws - got
            batch = min(cap, int(math.ceil(need / self.acceptance * 1.2)) + 16)
            draws = self.base.draw_many(batch, child_sequence(seed, tried))
            distance = self.mahalanobis(draws)
            ok = np.flatnonzero(distance <= self.threshold)[:need]
            if ok.size:
                part = draws.take(ok)
                kept.append(
                    Draws._owned(
                        part.indptr,
                        part.indices,
                        part.n_units,
                        {**part.extra, "mahalanobis": distance[ok]},
                    )
                )
            got += ok.size
            tried += batch
            if got < n_draws and tried >= 2000 and got < tried * self.acceptance / 10:
                raise DesignError(
                    f"only {got} of {tried} draws of the base design met the balance rule "
                    f"M <= {self.threshold:.4g}, far below the planned acceptance "
                    f"{self.acceptance:g}: this base design cannot balance "
                    f"{describe_rows(list(self.covariate_names or ()))} that tightly; raise acceptance"
                )
        return Draws.concat(kept)

    def describe(self) -> str:
        """Return a plain sentence describing the procedure."""
        return (
            f"Rerandomization (Morgan & Rubin 2012) of: {self.base.describe()} Draws are kept "
            f"only when the Mahalanobis distance between treated and control means of "
            f"{len(self.covariate_names or ())} covariates is at most {self.threshold:.4g} (planned acceptance "
            f"{self.acceptance:.0%})."
        )


Sampler = CompleteSampler | BlockedSampler | SeparatedSampler | SaturationSampler | Rerandomized
SamplerKind = Literal["complete", "blocked", "separated", "saturation", "rerandomized"]
