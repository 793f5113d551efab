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
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, ClassVar, Literal

import numpy as np
import pandas as pd
import scipy.linalg
import scipy.sparse
import scipy.stats

from geoexp._engine import Engine, resolve_engine
from geoexp._rng import RngLike, as_seed_sequence, child_sequence
from geoexp.design._draws import Draws
from geoexp.design._kernels import DONE, PackingProblem, greedy_pack, sample_subsets
from geoexp.errors import DesignError, InfeasibleDesignError, InputError, describe_rows

__all__ = [
    "CompleteSampler",
    "BlockedSampler",
    "SeparatedSampler",
    "SaturationSampler",
    "Rerandomized",
]

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
    eligible: np.ndarray

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
        local = _subset_matrix(main, extension, self.eligible.size, self.n_treated, n_draws)
        return Draws.from_rows(self.eligible[local], self.n_units)

    def describe(self) -> str:
        """Return a plain sentence describing the procedure."""
        return (
            f"Complete randomization: {self.n_treated:,} of {self.eligible.size:,} eligible "
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
        return Draws.from_rows(self.eligible[local], self.n_units)

    def describe(self) -> str:
        """Return a plain sentence describing the procedure."""
        return (
            f"Blocked randomization: {self.n_treated:,} of {self.eligible.size:,} eligible units "
            f"treated, a fixed number in each of {self.block_labels.size:,} blocks, every set "
            "within a block equally likely."
        )


def _eligible_graph(indptr: np.ndarray, indices: np.ndarray, eligible: np.ndarray, n_units: int):
    """Symmetric, loop-free CSR of the gap graph restricted to eligible units (local numbering)."""
    rows = np.repeat(np.arange(n_units, dtype=np.int64), np.diff(indptr))
    local = np.full(n_units, -1, dtype=np.int64)
    local[eligible] = np.arange(eligible.size)
    lr, lc = local[rows], local[indices]
    keep = (lr >= 0) & (lc >= 0) & (lr != lc)
    lr, lc = lr[keep], lc[keep]
    n_e = eligible.size
    # symmetrise: "within the gap" is symmetric even if the caller's CSR lists one direction
    matrix = scipy.sparse.csr_array(
        (np.ones(2 * lr.size, dtype=np.int8), (np.concatenate([lr, lc]), np.concatenate([lc, lr]))),
        shape=(n_e, n_e),
    )
    matrix.sum_duplicates()
    matrix.sort_indices()
    return matrix.indptr.astype(np.int64), matrix.indices.astype(np.int32)


def _csr_arrays(gap_graph: Any, n_units: int) -> tuple[np.ndarray, np.ndarray]:
    if isinstance(gap_graph, tuple) and len(gap_graph) == 2:
        indptr, indices = gap_graph
    elif hasattr(gap_graph, "indptr") and hasattr(gap_graph, "indices"):
        indptr, indices = gap_graph.indptr, gap_graph.indices
    else:
        raise InputError(
            "gap_graph must be a CSR pair (indptr, indices) or an object with .indptr and "
            f".indices (such as an ExposureGraph), got {type(gap_graph).__name__}"
        )
    indptr = np.array(indptr, dtype=np.int64)
    indices = np.array(indices, dtype=np.int64)
    if indptr.shape != (n_units + 1,) or indptr[0] != 0 or indptr[-1] != indices.size:
        raise InputError(
            f"gap_graph.indptr must have n_units + 1 = {n_units + 1} entries, start at 0 and "
            f"end at len(indices) = {indices.size}"
        )
    if np.any(np.diff(indptr) < 0):
        raise InputError("gap_graph.indptr must be non-decreasing")
    if indices.size and (indices.min() < 0 or indices.max() >= n_units):
        raise InputError(f"gap_graph.indices must be positions in 0..{n_units - 1}")
    return _readonly(indptr), _readonly(indices.astype(np.int32))


@dataclass(frozen=True, eq=False)
class SeparatedSampler(_Chunked):
    """Treated units kept apart: no two treated units closer than the gap.

    The procedure is random sequential greedy packing: each draw reads an iid
    uniform sequence of eligible units (its order of first appearance is a
    uniformly random order) and accepts a unit if it is neither accepted nor
    blocked and its block's quota is not yet full; an accepted unit blocks its
    gap-neighbours. A draw stops when every quota is met. A draw that gets
    stuck (an unmet quota with no unit left to take) is rejected and redrawn
    from scratch, so the design is *greedy packing in uniformly random order,
    conditioned on reaching the quotas*. Its probabilities are those of this
    procedure (not uniform over separated sets) and are estimated by Monte
    Carlo.

    At construction a pilot of 200 packings (fixed internal seed) checks that
    at least half reach the quotas, else InfeasibleDesignError reports the
    largest and the typical number of treated units greedy packing reached.

    Parameters
    ----------
    n_units : int
        Units in the full layer.
    eligible : numpy.ndarray or None
        Positions that may be treated (None: all units).
    n_treated : int or None
        Number treated; leave None when ``quotas`` are given.
    gap_graph : tuple or graph
        CSR ``(indptr, indices)`` over full-layer positions listing the pairs
        closer than the gap (use :meth:`from_graph` to cut an exposure graph
        at the gap).
    blocks : numpy.ndarray, optional
        Block label per eligible unit, with ``quotas``.
    quotas : mapping, optional
        Block label -> number treated in that block.
    engine : {"auto", "numba", "numpy"}
        Step loop implementation; both give identical draws.
    gap : float, optional
        The gap in metres that ``gap_graph`` encodes, for the record and
        messages only (the graph alone decides which pairs are too close).
    """

    n_units: int
    eligible: np.ndarray | None
    n_treated: int | None
    gap_graph: Any
    blocks: np.ndarray | None = None
    quotas: Mapping[Any, int] | None = None
    engine: Engine = "auto"
    gap: float | None = None

    default_chunk: ClassVar[int] = SEPARATED_CHUNK
    problem: PackingProblem = field(init=False, repr=False)
    block_labels: np.ndarray = field(init=False, repr=False)
    pilot_success: float = field(init=False, repr=False)
    pilot_median: float = field(init=False, repr=False)
    _engine: str = field(init=False, repr=False)

    def __post_init__(self) -> None:
        n_units, eligible = _layer(self.n_units, self.eligible)
        n_e = eligible.size
        if self.quotas is None:
            m = self.n_treated
            if isinstance(m, bool) or not isinstance(m, (int, np.integer)) or m < 1:
                raise DesignError(f"n_treated must be a whole number >= 1, got {m!r}")
            if m > n_e:
                raise InfeasibleDesignError(
                    f"n_treated = {m} but only {n_e} units are eligible; choose at most {n_e}"
                )
            if self.blocks is not None:
                raise DesignError("blocks need quotas (block label -> count)")
            codes = np.zeros(n_e, dtype=np.int32)
            labels = np.array(["all"], dtype=object)
            quota = np.array([int(m)], dtype=np.int64)
        else:
            if self.n_treated is not None:
                raise DesignError("give n_treated or quotas by block, not both")
            if self.blocks is None:
                raise DesignError("quotas need blocks (a block label per eligible unit)")
            codes, labels = _factorize(self.blocks, n_e, "blocks")
            quota = _quota_array(self.quotas, labels, np.bincount(codes, minlength=labels.size))
            object.__setattr__(self, "blocks", _readonly(np.array(self.blocks)))
            object.__setattr__(self, "quotas", dict(self.quotas))
        indptr, indices = _csr_arrays(self.gap_graph, n_units)
        nbr_ptr, nbr_idx = _eligible_graph(indptr, indices, eligible, n_units)
        problem = PackingProblem(
            nbr_ptr=_readonly(nbr_ptr),
            nbr_idx=_readonly(nbr_idx),
            block=_readonly(codes),
            quota=_readonly(quota),
            block_size=_readonly(np.bincount(codes, minlength=labels.size).astype(np.int64)),
        )
        object.__setattr__(self, "n_units", n_units)
        object.__setattr__(self, "eligible", eligible)
        object.__setattr__(self, "n_treated", problem.total)
        object.__setattr__(self, "gap_graph", (indptr, indices))
        object.__setattr__(self, "problem", problem)
        object.__setattr__(self, "block_labels", _readonly(labels))
        object.__setattr__(self, "_engine", resolve_engine(self.engine))
        self._pilot()

    @classmethod
    def from_graph(
        cls,
        graph: Any,
        gap: float,
        eligible: np.ndarray | None = None,
        n_treated: int | None = None,
        *,
        blocks: np.ndarray | None = None,
        quotas: Mapping[Any, int] | None = None,
        engine: Engine = "auto",
    ) -> SeparatedSampler:
        """Build from an exposure graph, keeping treated units at least ``gap`` metres apart.

        Parameters
        ----------
        graph : ExposureGraph
            Any object with CSR ``indptr``, ``indices``, ``distances`` (metres)
            and ``max_distance``.
        gap : float
            Minimum distance in metres between two treated units; pairs with
            distance < gap may not both be treated. Must not exceed the
            graph's ``max_distance`` (farther pairs are not in the graph).
        eligible, n_treated, blocks, quotas, engine
            As for the class.

        Returns
        -------
        SeparatedSampler
        """
        gap = float(gap)
        if not (math.isfinite(gap) and gap > 0):
            raise DesignError(f"gap must be a positive number of metres, got {gap!r}")
        if gap > float(graph.max_distance):
            raise DesignError(
                f"gap {gap:g} m exceeds the exposure graph's max_distance "
                f"{float(graph.max_distance):g} m; rebuild the graph with max_distance >= {gap:g}"
            )
        indptr = np.asarray(graph.indptr, dtype=np.int64)
        close = np.asarray(graph.distances) < gap
        rows = np.repeat(np.arange(indptr.size - 1), np.diff(indptr))
        new_ptr = np.zeros(indptr.size, dtype=np.int64)
        np.cumsum(np.bincount(rows[close], minlength=indptr.size - 1), out=new_ptr[1:])
        return cls(
            indptr.size - 1,
            eligible,
            n_treated,
            (new_ptr, np.asarray(graph.indices)[close]),
            blocks=blocks,
            quotas=quotas,
            engine=engine,
            gap=gap,
        )

    @property
    def block_length(self) -> int:
        """Candidates handed to each draw per round (later rounds extend, never restart)."""
        return 2 * self.problem.total + 32

    def _pilot(self) -> None:
        main, extension = _generators(np.random.SeedSequence(_PILOT_SEED), 2)
        state = greedy_pack(
            self.problem,
            PILOT_DRAWS,
            main,
            extension,
            self.block_length,
            retry=False,
            engine=self._engine,
        )
        reached = state.status == DONE
        success = float(reached.mean())
        median = float(np.median(state.n_acc))
        object.__setattr__(self, "pilot_success", success)
        object.__setattr__(self, "pilot_median", median)
        if success >= 0.5:
            return
        largest = int(state.n_acc.max())
        message = (
            f"treated units kept apart cannot reliably reach {self.problem.total} treated: "
            f"greedy packing in random order reached it in {int(reached.sum())} of "
            f"{PILOT_DRAWS} pilot draws. The largest number of treated units it placed was "
            f"{largest}, typically (median) {int(median)}: choose at most {int(median)} treated "
            "units, or a smaller gap" + (f" than {self.gap:g} m" if self.gap is not None else "")
        )
        if self.problem.quota.size > 1:
            short = (state.counts < self.problem.quota) & ~reached[:, None]
            worst = np.argsort(-short.sum(axis=0), kind="stable")
            worst = worst[short.sum(axis=0)[worst] > 0]
            message += ", or smaller quotas in the blocks left short most often: " + describe_rows(
                self.block_labels[worst].tolist()
            )
        raise InfeasibleDesignError(message)

    def _draw_chunk(self, n_draws: int, seed: np.random.SeedSequence) -> Draws:
        main, extension = _generators(seed, 2)
        state = greedy_pack(
            self.problem,
            n_draws,
            main,
            extension,
            self.block_length,
            retry=True,
            engine=self._engine,
        )
        return Draws.from_rows(self.eligible[state.accepted], self.n_units)

    def with_engine(self, engine: Engine) -> SeparatedSampler:
        """Return the same design with another step-loop engine (identical draws)."""
        return SeparatedSampler(
            self.n_units,
            self.eligible,
            None if self.quotas is not None else self.n_treated,
            self.gap_graph,
            blocks=self.blocks,
            quotas=self.quotas,
            engine=engine,
            gap=self.gap,
        )

    def describe(self) -> str:
        """Return a plain sentence describing the procedure."""
        blocks = (
            f" with fixed numbers in {self.block_labels.size:,} blocks"
            if self.quotas is not None
            else ""
        )
        gap = f"{self.gap:g} m" if self.gap is not None else "the gap"
        return (
            f"Treated units kept apart: {self.n_treated:,} of {self.eligible.size:,} eligible "
            f"units treated{blocks}, no two closer than {gap}, by greedy packing in uniformly "
            f"random order, redrawn when it gets stuck ({self.pilot_success:.0%} of pilot "
            "packings reached the target)."
        )


def _level_counts(cluster_counts: Any, n_levels: int, n_clusters: int) -> np.ndarray:
    """Counts of clusters per level from counts (sum = C) or shares (sum = 1)."""
    values = np.asarray(cluster_counts, dtype=np.float64)
    if values.shape != (n_levels,) or not np.isfinite(values).all() or (values < 0).any():
        raise DesignError(
            f"cluster_counts must give {n_levels} non-negative numbers (one per saturation "
            f"level), got {cluster_counts!r}"
        )
    if np.all(values == np.round(values)) and values.sum() == n_clusters:
        return values.astype(np.int64)
    if abs(values.sum() - 1.0) < 1e-9:
        # largest-remainder rounding of shares x C, ties to the lower level index
        exact = values * n_clusters
        counts = np.floor(exact + 1e-9).astype(np.int64)
        left = n_clusters - int(counts.sum())
        order = np.argsort(-(exact - counts), kind="stable")
        counts[order[:left]] += 1
        return counts
    raise DesignError(
        f"cluster_counts must be counts summing to the number of clusters ({n_clusters}) or "
        f"shares summing to 1; got {values.tolist()} (sum {values.sum():g})"
    )


@dataclass(frozen=True, eq=False)
class SaturationSampler(_Chunked):
    """Randomized saturation design (two-stage randomization).

    Hudgens & Halloran (2008); Baird, Bohren, McIntosh & Özler (2018). Stage
    one assigns the clusters to saturation levels by complete randomization
    of clusters to levels (``cluster_counts[l]`` clusters get level l, every
    arrangement equally likely). Stage two treats, in a cluster of n_c
    eligible units at level s, exactly ``floor(s * n_c + 0.5)`` units (round
    half up) by complete randomization within the cluster. Each draw records
    its clusters' level indices in ``Draws.extra["cluster_level"]`` (R x C,
    int8, columns in the order of ``cluster_labels``). Probabilities are those
    of this procedure, estimated by Monte Carlo. A level of 0 gives the pure
    control clusters the spillover contrast needs.

    Parameters
    ----------
    n_units : int
        Units in the full layer.
    eligible : numpy.ndarray or None
        Positions that may be treated (None: all units).
    clusters : numpy.ndarray
        Cluster label of each eligible unit.
    saturations : sequence of float
        Distinct levels in [0, 1].
    cluster_counts : sequence
        Clusters per level: counts summing to the number of clusters, or
        shares summing to 1 (then rounded to counts by largest remainder).
    """

    n_units: int
    eligible: np.ndarray | None
    clusters: np.ndarray
    saturations: Sequence[float]
    cluster_counts: Sequence[float]

    cluster_labels: np.ndarray = field(init=False, repr=False)
    cluster_codes: np.ndarray = field(init=False, repr=False)
    cluster_size: np.ndarray = field(init=False, repr=False)
    level_counts: np.ndarray = field(init=False, repr=False)
    treated_table: np.ndarray = field(init=False, repr=False)
    _members: list = field(init=False, repr=False)

    def __post_init__(self) -> None:
        n_units, eligible = _layer(self.n_units, self.eligible)
        levels = np.asarray(self.saturations, dtype=np.float64).reshape(-1)
        if levels.size == 0 or not np.isfinite(levels).all():
            raise DesignError(f"saturations must be numbers in [0, 1], got {self.saturations!r}")
        bad = levels[(levels < 0) | (levels > 1)]
        if bad.size:
            raise DesignError(
                f"saturations must lie in [0, 1] (shares of a cluster treated); got "
                f"{describe_rows(bad.tolist())}"
            )
        if np.unique(levels).size != levels.size:
            raise DesignError(f"saturations must be distinct, got {levels.tolist()}")
        if levels.size > 127:
            raise DesignError("at most 127 saturation levels are supported")
        codes, labels = _factorize(self.clusters, eligible.size, "clusters")
        sizes = np.bincount(codes, minlength=labels.size).astype(np.int64)
        counts = _level_counts(self.cluster_counts, levels.size, labels.size)
        # round half up; the tolerance makes decimal levels such as 0.15 x 10
        # behave as written despite binary floating point
        table = np.floor(np.outer(sizes, levels) + 0.5 + 1e-9).astype(np.int64)
        if counts[levels > 0].sum() == 0 or table[:, levels > 0].max(initial=0) == 0:
            raise DesignError(
                "no unit would ever be treated: every cluster gets saturation 0 or rounds to 0"
            )
        object.__setattr__(self, "n_units", n_units)
        object.__setattr__(self, "eligible", eligible)
        object.__setattr__(self, "clusters", _readonly(np.array(self.clusters)))
        object.__setattr__(self, "saturations", tuple(levels.tolist()))
        object.__setattr__(self, "cluster_counts", tuple(counts.tolist()))
        object.__setattr__(self, "cluster_labels", _readonly(labels))
        object.__setattr__(self, "cluster_codes", _readonly(codes))
        object.__setattr__(self, "cluster_size", _readonly(sizes))
        object.__setattr__(self, "level_counts", _readonly(counts))
        object.__setattr__(self, "treated_table", _readonly(table))
        object.__setattr__(self, "_members", _members(codes, labels.size))

    def _draw_chunk(self, n_draws: int, seed: np.random.SeedSequence) -> Draws:
        level_rng, main, extension = _generators(seed, 3)
        slots = np.repeat(np.arange(len(self.saturations), dtype=np.int8), self.level_counts)
        # a uniformly random arrangement of the level slots over the clusters, per draw
        levels = level_rng.permuted(np.tile(slots, (n_draws, 1)), axis=1)
        all_rows, all_pos = [], []
        for c, members in enumerate(self._members):
            m_row = self.treated_table[c][levels[:, c]]
            if m_row.max(initial=0) == 0:
                continue
            rows, values = sample_subsets(main, extension, members.size, m_row)
            all_rows.append(rows)
            all_pos.append(self.eligible[members[values]])
        rows = np.concatenate(all_rows) if all_rows else np.zeros(0, np.int64)
        pos = np.concatenate(all_pos) if all_pos else np.zeros(0, np.int64)
        key = np.sort(rows * self.n_units + pos)
        rows = key // self.n_units
        indptr = np.zeros(n_draws + 1, dtype=np.int64)
        np.cumsum(np.bincount(rows, minlength=n_draws), out=indptr[1:])
        return Draws._owned(
            indptr, key - rows * self.n_units, self.n_units, {"cluster_level": levels}
        )

    def describe(self) -> str:
        """Return a plain sentence describing the procedure."""
        plan = ", ".join(
            f"{c} at {s:.0%}"
            for s, c in zip(self.saturations, self.level_counts.tolist(), strict=True)
        )
        return (
            f"Randomized saturation: {self.cluster_labels.size:,} clusters assigned to saturation "
            f"levels at random ({plan}), then within each cluster that share of its eligible "
            "units (rounded half up) treated at random."
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
        names = self.covariate_names
        if isinstance(self.covariates, pd.DataFrame) and names is None:
            names = [str(c) for c in self.covariates.columns]
        x = np.array(self.covariates, dtype=np.float64)
        if x.ndim == 1:
            x = x[:, None]
        n_e = base.eligible.size
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
                + describe_rows(base.eligible[bad_rows].tolist())
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
        local[base.eligible] = np.arange(n_e)
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
    def n_units(self) -> int:  # type: ignore[override]
        """Units in the full layer (from the base sampler)."""
        return self.base.n_units

    @property
    def eligible(self) -> np.ndarray:  # type: ignore[override]
        """Eligible positions (from the base sampler)."""
        return self.base.eligible

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
                    f"{describe_rows(list(self.covariate_names))} that tightly; raise acceptance"
                )
        return Draws.concat(kept)

    def describe(self) -> str:
        """Return a plain sentence describing the procedure."""
        return (
            f"Rerandomization (Morgan & Rubin 2012) of: {self.base.describe()} Draws are kept "
            f"only when the Mahalanobis distance between treated and control means of "
            f"{len(self.covariate_names)} covariates is at most {self.threshold:.4g} (planned acceptance "
            f"{self.acceptance:.0%})."
        )


Sampler = CompleteSampler | BlockedSampler | SeparatedSampler | SaturationSampler | Rerandomized
SamplerKind = Literal["complete", "blocked", "separated", "saturation", "rerandomized"]
