"""The shared machinery of the samplers: chunked, reproducible draws and input checks.

See :mod:`geoexp.design._samplers` for the reproducibility rule every
sampler follows (chunk k of the draws uses child k of the seed sequence).
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from typing import Any, ClassVar, cast

import numpy as np
import pandas as pd

from geoexp._rng import RngLike, as_seed_sequence, child_sequence
from geoexp.design._draws import Draws
from geoexp.design._kernels import sample_subsets
from geoexp.errors import DesignError, InfeasibleDesignError, InputError, describe_rows

DEFAULT_CHUNK = 1000
SEPARATED_CHUNK = 256
PILOT_DRAWS = 200
# The feasibility pilot of SeparatedSampler uses its own fixed stream so that
# building the same sampler always passes or fails the same way.
_PILOT_SEED = 8_675_309


def _readonly(array: np.ndarray) -> np.ndarray:
    array.flags.writeable = False
    return array


def _generators(seed: np.random.SeedSequence, k: int) -> list[np.random.Generator]:
    return [np.random.default_rng(child_sequence(seed, i)) for i in range(k)]


def _positive_int(value: Any, what: str) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise InputError(f"{what} must be a positive integer, got {value!r}")
    return int(value)


def _layer(n_units: Any, eligible: Any) -> tuple[int, np.ndarray]:
    """Validate the layer size and the eligible positions; return read-only int64 positions."""
    n_units = _positive_int(n_units, "n_units")
    if eligible is None:
        return n_units, _readonly(np.arange(n_units, dtype=np.int64))
    eligible = np.asarray(eligible)
    if eligible.dtype == bool:
        if eligible.shape != (n_units,):
            raise InputError(
                f"a boolean eligible mask must have one entry per unit ({n_units}), "
                f"got shape {eligible.shape}"
            )
        return n_units, _readonly(np.flatnonzero(eligible).astype(np.int64))
    if eligible.ndim != 1 or not np.issubdtype(eligible.dtype, np.integer):
        raise InputError("eligible must be a 1-D array of integer positions (or a boolean mask)")
    eligible = eligible.astype(np.int64)
    bad = np.flatnonzero((eligible < 0) | (eligible >= n_units))
    if bad.size:
        raise InputError(
            f"eligible holds positions outside 0..{n_units - 1}: "
            f"{describe_rows(eligible[bad].tolist())}"
        )
    values, counts = np.unique(eligible, return_counts=True)
    if (counts > 1).any():
        raise InputError(
            f"eligible lists positions more than once: {describe_rows(values[counts > 1].tolist())}"
        )
    if eligible.size == 0:
        raise InfeasibleDesignError("no unit is eligible, so nothing can be randomized")
    return n_units, _readonly(eligible)


def _factorize(labels: Any, n_e: int, what: str) -> tuple[np.ndarray, np.ndarray]:
    """Return (codes, labels) for one label per eligible unit."""
    labels = np.asarray(labels)
    if labels.shape != (n_e,):
        raise InputError(
            f"{what} must hold one label per eligible unit ({n_e}), got shape {labels.shape}"
        )
    missing = np.flatnonzero(pd.isna(labels))
    if missing.size:
        raise InputError(
            f"{what} is missing for eligible units at rows {describe_rows(missing.tolist())}"
        )
    try:
        codes, uniques = pd.factorize(labels, sort=True)
    except TypeError:  # labels of mixed, unorderable types keep first-seen order
        codes, uniques = pd.factorize(labels, sort=False)
    return codes.astype(np.int32), np.asarray(uniques)


def _quota_array(quotas: Mapping, labels: np.ndarray, sizes: np.ndarray) -> np.ndarray:
    """Quota per block code, with errors that say what is possible."""
    if not isinstance(quotas, Mapping):
        raise InputError(f"quotas must be a mapping block label -> count, got {type(quotas)}")
    known = set(labels.tolist())
    unknown = [k for k in quotas if k not in known]
    if unknown:
        raise DesignError(
            f"quotas name blocks that no eligible unit is in: {describe_rows(unknown)}; "
            f"the blocks are {describe_rows(labels.tolist())}"
        )
    without = [lab for lab in labels.tolist() if lab not in quotas]
    if without:
        raise DesignError(
            f"give a quota (0 is allowed) for every block; missing: {describe_rows(without)}"
        )
    quota = np.zeros(labels.size, dtype=np.int64)
    for b, label in enumerate(labels.tolist()):
        q = quotas[label]
        if isinstance(q, bool) or not isinstance(q, (int, np.integer)) or q < 0:
            raise DesignError(
                f"the quota of block {label!r} must be a whole number >= 0, got {q!r}"
            )
        quota[b] = int(q)
    over = np.flatnonzero(quota > sizes)
    if over.size:
        names = labels.tolist()
        raise InfeasibleDesignError(
            "a block's quota is larger than the block: "
            + "; ".join(
                f"block {names[b]!r} has {sizes[b]} eligible units but quota {quota[b]}"
                for b in over[:10]
            )
        )
    if quota.sum() == 0:
        raise DesignError("every block's quota is 0, so no unit would be treated")
    return quota


def _members(codes: np.ndarray, n_groups: int) -> list[np.ndarray]:
    """Eligible-local indices of each group, ascending."""
    order = np.argsort(codes, kind="stable")
    bounds = np.searchsorted(codes[order], np.arange(n_groups + 1))
    return [_readonly(order[bounds[g] : bounds[g + 1]]) for g in range(n_groups)]


def _subset_matrix(
    main: np.random.Generator, extension: np.random.Generator, n: int, m: int, n_rows: int
) -> np.ndarray:
    """(n_rows, m) matrix of uniformly random m-subsets of range(n)."""
    _, values = sample_subsets(main, extension, n, np.full(n_rows, m, dtype=np.int64))
    return values.reshape(n_rows, m)


class _Chunked:
    """Shared draw / draw_many / iter_chunks over a per-chunk ``_draw_chunk``."""

    default_chunk: ClassVar[int] = DEFAULT_CHUNK
    n_units: int
    # As given: positions, a boolean mask or None (all units); each sampler's
    # __post_init__ replaces it by ascending int64 positions (see _layer).
    eligible: np.ndarray | None

    @property
    def positions(self) -> np.ndarray:
        """Eligible positions: ascending int64, read-only (``eligible`` once normalised)."""
        return cast(np.ndarray, self.eligible)

    def _draw_chunk(self, n_draws: int, seed: np.random.SeedSequence) -> Draws:
        raise NotImplementedError

    def draw(self, rng: RngLike = None) -> np.ndarray:
        """Draw one assignment.

        Parameters
        ----------
        rng : None, int, SeedSequence or Generator
            Randomness; the same int seed gives the same assignment.

        Returns
        -------
        numpy.ndarray
            Ascending treated positions (int64) in the full unit layer; equal
            to ``self.draw_many(1, rng).treated(0)``.
        """
        return self.draw_many(1, rng).treated(0).astype(np.int64)

    def draw_many(self, n_draws: int, rng: RngLike = None, *, chunk: int | None = None) -> Draws:
        """Draw ``n_draws`` assignments.

        Parameters
        ----------
        n_draws : int
            Number of draws R.
        rng : None, int, SeedSequence or Generator
            Randomness, normalised once; chunk k uses the k-th spawned child.
        chunk : int, optional
            Draws per chunk (default: the sampler's fixed ``default_chunk``).
            The result depends on (seed, n_draws, chunk).

        Returns
        -------
        Draws
        """
        return Draws.concat(list(self.iter_chunks(n_draws, rng, chunk=chunk)))

    def iter_chunks(
        self, n_draws: int, rng: RngLike = None, chunk: int | None = None
    ) -> Iterator[Draws]:
        """Yield the draws of ``draw_many`` chunk by chunk (for runs too big to hold).

        Parameters
        ----------
        n_draws : int
            Total number of draws.
        rng : None, int, SeedSequence or Generator
            Randomness, normalised once here (not lazily).
        chunk : int, optional
            Draws per chunk (default: the sampler's ``default_chunk``).

        Returns
        -------
        Iterator[Draws]
            Chunks whose concatenation equals ``draw_many(n_draws, rng, chunk=chunk)``.
        """
        n_draws = _positive_int(n_draws, "n_draws")
        chunk = self.default_chunk if chunk is None else _positive_int(chunk, "chunk")
        seed = as_seed_sequence(rng)
        return self._chunks(n_draws, seed, chunk)

    def _chunks(self, n_draws: int, seed: np.random.SeedSequence, chunk: int) -> Iterator[Draws]:
        for index, start in enumerate(range(0, n_draws, chunk)):
            yield self._draw_chunk(min(chunk, n_draws - start), child_sequence(seed, index))
