"""Kept-apart designs: no two treated units closer than a gap (random sequential greedy packing)."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar, Literal

import numpy as np
import scipy.sparse

from geoexp._engine import Engine, resolve_engine
from geoexp.design._chunked import (
    _PILOT_SEED,
    PILOT_DRAWS,
    SEPARATED_CHUNK,
    _Chunked,
    _factorize,
    _generators,
    _layer,
    _quota_array,
    _readonly,
)
from geoexp.design._draws import Draws
from geoexp.design._kernels import DONE, PackingProblem, greedy_pack
from geoexp.errors import DesignError, InfeasibleDesignError, InputError, describe_rows


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
    _engine: Literal["numba", "numpy"] = field(init=False, repr=False)

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
        return Draws.from_rows(self.positions[state.accepted], self.n_units)

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
            f"Treated units kept apart: {self.n_treated:,} of {self.positions.size:,} eligible "
            f"units treated{blocks}, no two closer than {gap}, by greedy packing in uniformly "
            f"random order, redrawn when it gets stuck ({self.pilot_success:.0%} of pilot "
            "packings reached the target)."
        )
