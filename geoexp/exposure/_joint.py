"""Joint exposure probabilities from bit-packed indicators of many draws.

The conservative variance estimators of Aronow & Samii (2017) need, for pairs
of units (i, j), the joint probability pi_ij(k, l) that i is in condition k and
j in condition l. For the analysis only one pair of conditions per pair of
units matters: the conditions the units were observed in. So for each unit we
keep one bit per draw, 1[D_i^r = c_i] for a target condition c_i, packed 64
draws to a word: memory is n_units * R / 8 bytes (125 MB for 100,000 units and
10,000 draws), and pi_ij = popcount(A_i & A_j) / R for any set of pairs.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from geoexp._engine import Engine
from geoexp._progress import tracked
from geoexp._rng import RngLike, as_seed_sequence
from geoexp.errors import InputError
from geoexp.exposure._kernels import (
    condition_bits_chunk,
    pair_popcounts,
)
from geoexp.exposure._mapping import ExposureMapping
from geoexp.exposure._probabilities import DrawSource
from geoexp.exposure._reach import BandedReach

if TYPE_CHECKING:
    from geoexp.graph import ExposureGraph

_WORD = 64
_PAIRS_PER_BLOCK = 65_536


@dataclass(frozen=True, eq=False)
class ConditionIndicators:
    """Bit-packed indicators ``1[D_i^r = c_i]`` for a set of units over R draws.

    Attributes
    ----------
    ids
        Ids of the units held, in row order.
    positions
        Their positions in the graph.
    target
        Condition code each unit's bits refer to.
    bits
        uint64 array (n_held, ceil(R / 64)); bit r % 64 of word r // 64 is draw r.
    n_draws
        Number of draws R.
    """

    ids: pd.Index
    positions: np.ndarray
    target: np.ndarray
    bits: np.ndarray
    n_draws: int

    def marginal(self) -> np.ndarray:
        """Probability of each held unit's target condition."""
        return np.bitwise_count(self.bits).sum(axis=1) / self.n_draws

    def joint(self, first: np.ndarray, second: np.ndarray) -> np.ndarray:
        """Joint probabilities for pairs given as row numbers into the held units."""
        first = np.asarray(first, dtype=np.int64)
        second = np.asarray(second, dtype=np.int64)
        if first.shape != second.shape:
            raise InputError("first and second must have the same length")
        out = np.empty(first.size, dtype=np.float64)
        for s in range(0, first.size, _PAIRS_PER_BLOCK):
            a = first[s : s + _PAIRS_PER_BLOCK]
            b = second[s : s + _PAIRS_PER_BLOCK]
            out[s : s + a.size] = np.bitwise_count(self.bits[a] & self.bits[b]).sum(axis=1)
        return out / self.n_draws

    def gram(self) -> np.ndarray:
        """Dense matrix of joint probabilities between all held units (small sets only)."""
        n = self.bits.shape[0]
        if n > 20_000:
            raise InputError(
                f"a dense joint-probability matrix of {n} units would need {n * n * 8 / 1e9:.1f} GB; "
                "ask for the pairs you need with joint()"
            )
        out = np.zeros((n, n), dtype=np.float64)
        words_per_block = max(1, 4096 // _WORD)
        for w in range(0, self.bits.shape[1], words_per_block):
            block = self.bits[:, w : w + words_per_block]
            dense = unpack_bits(block, np.float32)
            out += (dense @ dense.T).astype(np.float64)
        return out / self.n_draws


def condition_indicators(
    sampler: DrawSource,
    graph: ExposureGraph,
    mapping: ExposureMapping,
    target: np.ndarray,
    n_draws: int = 10_000,
    rng: RngLike = None,
    *,
    units: np.ndarray | None = None,
) -> ConditionIndicators:
    """Bit-packed indicators of each unit being in its target condition, draw by draw.

    Use the same ``rng`` and ``n_draws`` as :func:`exposure_probabilities` to get
    the very same draws, so that joint and marginal probabilities agree.

    Parameters
    ----------
    sampler, graph, mapping
        As for :func:`exposure_probabilities`.
    target
        Condition code per unit (length n_units), typically the observed conditions.
    n_draws, rng
        Number of draws and their seed.
    units
        Positions of the units to hold (default: all).

    Returns
    -------
    ConditionIndicators
        The packed indicators, one bit per draw, for the held units.
    """
    target = np.asarray(target, dtype=np.int64)
    if target.shape != (graph.n,):
        raise InputError(f"target must give one condition per unit ({graph.n}), got {target.shape}")
    positions = np.arange(graph.n) if units is None else np.asarray(units, dtype=np.int64)
    every = _condition_bits(sampler, graph, mapping, n_draws, rng, units=positions)
    held_target = target[positions]
    return ConditionIndicators(
        ids=graph.ids[positions],
        positions=positions,
        target=held_target,
        bits=every.bits[held_target, np.arange(positions.size)],
        n_draws=n_draws,
    )


@dataclass(frozen=True, eq=False)
class ConditionBits:
    """Bit-packed indicators of every condition for a set of units over R draws.

    ``bits[c, i]`` holds one bit per draw: unit ``i`` (a row of the held units)
    was in condition ``c`` in that draw. Memory: n_conditions * n_held * R / 8
    bytes. Joint probabilities of any pair of units and conditions are popcounts.
    """

    ids: pd.Index
    positions: np.ndarray
    bits: np.ndarray
    n_draws: int
    _cache: dict = field(default_factory=dict, repr=False)

    def probabilities(self) -> np.ndarray:
        """Marginal probabilities (n_held, n_conditions)."""
        return (np.bitwise_count(self.bits).sum(axis=2) / self.n_draws).T

    def joint_pairs(self, k: int, first: np.ndarray, l: int, second: np.ndarray) -> np.ndarray:
        """pi_ij(k, l) for pairs of held rows (``first[p]``, ``second[p]``)."""
        counts = pair_popcounts(self.bits[k], self.bits[l], first, second)
        return counts / self.n_draws

    def joint_block(self, k: int, rows: np.ndarray, l: int, cols: np.ndarray) -> np.ndarray:
        """Dense pi_ij(k, l) for every held row in ``rows`` against every one in ``cols``.

        Computed as products of unpacked bit blocks in float32, which count
        exactly up to 2**24 draws.
        """
        rows = np.asarray(rows, dtype=np.int64)
        cols = np.asarray(cols, dtype=np.int64)
        # the Hajek and Horvitz-Thompson variances of a contrast ask for the same blocks
        key = (k, l, hash(rows.tobytes()), hash(cols.tobytes()))
        if key in self._cache:
            return self._cache[key]
        if len(self._cache) >= 8:
            self._cache.pop(next(iter(self._cache)))
        a_bits = self.bits[k][rows]
        b_bits = self.bits[l][cols]
        out = np.zeros((a_bits.shape[0], b_bits.shape[0]), dtype=np.float32)
        step = 16  # words per block: 1,024 draws
        for w in range(0, self.bits.shape[2], step):
            a = unpack_bits(a_bits[:, w : w + step], np.float32)
            b = unpack_bits(b_bits[:, w : w + step], np.float32)
            out += a @ b.T
        result = out.astype(np.float64) / self.n_draws
        result.flags.writeable = False
        self._cache[key] = result
        return result


def unpack_bits(words: np.ndarray, dtype: type = np.uint8) -> np.ndarray:
    """(rows, 64 * n_words) 0/1 indicators of a (rows, n_words) uint64 array, as ``dtype``.

    Bit ``r % 64`` of word ``r // 64`` is draw ``r`` (the layout of
    :class:`ConditionBits`).

    Parameters
    ----------
    words : numpy.ndarray
        A (rows, n_words) array of 64-bit words (read as little-endian uint64).
    dtype : numpy dtype, default numpy.uint8
        The type of the indicators returned.

    Returns
    -------
    numpy.ndarray
        A (rows, 64 * n_words) array of 0 and 1, column ``r`` for draw ``r``.
    """
    words = np.ascontiguousarray(words, dtype="<u8")
    flat = np.unpackbits(
        words.view(np.uint8).reshape(words.shape[0], -1), axis=1, bitorder="little"
    )
    return flat.astype(dtype, copy=False)


def condition_bits(
    sampler: DrawSource,
    graph: ExposureGraph,
    mapping: ExposureMapping,
    n_draws: int = 10_000,
    rng: RngLike = None,
    *,
    units: np.ndarray | None = None,
) -> ConditionBits:
    """Bit-packed indicators of every exposure condition for the held units, draw by draw.

    One pass over the draws of the design's own sampler; use the same ``rng``
    and ``n_draws`` as :func:`exposure_probabilities` to get the same draws.
    The kernel visits only the treated units' neighbour lists and sets the
    treated and band bits directly; the pure-control bits are the complement.

    Parameters
    ----------
    sampler : DrawSource
        The design's assignment sampler.
    graph : ExposureGraph
        Distances (metres) between units within the outermost band.
    mapping : ExposureMapping
        The exposure conditions (treated, distance bands, pure control).
    n_draws : int, default 10000
        Number of assignments to draw.
    rng : int, numpy.random.Generator or None
        Seed or generator for the draws.
    units : numpy.ndarray, optional
        Positions of the units to hold (default: every unit).

    Returns
    -------
    ConditionBits
        For each condition and held unit, one bit per draw (64 draws to a
        uint64 word).
    """
    return _condition_bits(sampler, graph, mapping, n_draws, rng, units=units)


def _condition_bits(
    sampler: DrawSource,
    graph: ExposureGraph,
    mapping: ExposureMapping,
    n_draws: int,
    rng: RngLike,
    *,
    units: np.ndarray | None = None,
    engine: Engine = "auto",
) -> ConditionBits:
    """:func:`condition_bits` with a choice of engine (numba or the numpy twin: identical bits)."""
    positions = np.arange(graph.n) if units is None else np.asarray(units, dtype=np.int64)
    reach = BandedReach.of(graph, mapping)
    pc = mapping.pure_control
    n_cond = mapping.n_conditions
    n_words = -(-n_draws // _WORD)
    # unit-major: one row of words per unit and condition
    bits = np.zeros((n_cond, positions.size, n_words), dtype=np.uint64)
    column = np.full(graph.n, -1, dtype=np.int64)
    column[positions] = np.arange(positions.size)
    draw0 = 0
    advance = tracked("draws of the design (joint probabilities)", n_draws)
    for chunk in sampler.iter_chunks(n_draws, as_seed_sequence(rng)):
        n_chunk = chunk.indptr.size - 1
        if draw0 + n_chunk > n_draws:
            raise RuntimeError(f"the sampler produced more than the {n_draws} draws asked for")
        condition_bits_chunk(
            chunk.indptr,
            chunk.indices,
            reach.indptr,
            reach.indices,
            reach.codes,
            column,
            draw0,
            bits,
            engine=engine,
        )
        draw0 += n_chunk
        advance(n_chunk)
    if draw0 != n_draws:
        raise RuntimeError(f"the sampler produced {draw0} draws, {n_draws} were asked for")
    # pure control: every draw in which the unit was in no other condition
    valid = np.full(n_words, np.uint64(2**64 - 1), dtype=np.uint64)
    if n_draws % _WORD:
        valid[-1] = np.uint64((1 << (n_draws % _WORD)) - 1)
    bits[pc] = ~np.bitwise_or.reduce(bits[:pc], axis=0) & valid[None, :]
    return ConditionBits(ids=graph.ids[positions], positions=positions, bits=bits, n_draws=n_draws)


# Above this many linked pairs the pairwise terms would not fit in memory.
MAX_DEPENDENT_PAIRS = 300_000_000
# Rows of units whose linked pairs are found at once.
_DEPENDENCE_ROWS = 8_192
# Every this many rows, one row's linked pairs size the arrays that hold them all.
_SAMPLE_STEP = 16


def _grown(array: np.ndarray, size: int, used: int) -> np.ndarray:
    """A new array of ``size`` entries holding the first ``used`` entries of ``array``."""
    out = np.empty(size, dtype=array.dtype)
    out[:used] = array[:used]
    return out


def dependence_pairs(
    graph: ExposureGraph,
    mapping: ExposureMapping,
    eligible: np.ndarray,
    *,
    gap: float | None = None,
    clusters: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Pairs of units whose exposure conditions can hinge on the same treatment decision.

    Unit i's condition is decided by the treatment of the eligible units within
    the outermost band of i (itself included, if eligible). Two units are
    linked when those sets share a unit; when they hold two eligible units
    closer than ``gap`` (in a kept-apart design treating one forbids the
    other); or, with ``clusters`` (a label per unit, randomized-saturation
    designs), when they hold eligible units of the same cluster, whose drawn
    saturation they share. Units not linked in any of these ways depend on
    each other only through the design's fixed totals (the number treated,
    block quotas), which makes them negatively associated. Returns both
    orders of every linked pair, without self pairs, as int32 (int64 beyond
    2**31 units) positions.

    Parameters
    ----------
    graph : ExposureGraph
        Distances (metres) between units within the outermost band.
    mapping : ExposureMapping
        The exposure conditions; its outermost band sets the reach.
    eligible : numpy.ndarray of bool
        Which units may be treated, one per unit.
    gap : float, optional
        The least distance in metres between two treated units in a kept-apart
        design; no larger than the graph's longest pair.
    clusters : numpy.ndarray, optional
        A cluster label per unit, for randomized-saturation designs.

    Returns
    -------
    tuple of numpy.ndarray
        ``(i, j)`` positions of the linked pairs.

    Raises
    ------
    geoexp.errors.InputError
        ``gap`` exceeds the longest distance the graph holds.
    """
    import scipy.sparse as sp

    n = graph.n
    eligible = np.asarray(eligible, dtype=bool)
    reach = BandedReach.of(graph, mapping)
    own = np.flatnonzero(eligible)
    # each unit's eligible units within reach, itself included when eligible, built as a CSR
    # straight from the reach's rows (no pair-length int64 copies), then put in canonical
    # form (sorted, no duplicates), as a matrix built from coordinates is
    sel = eligible[reach.indices]
    kept = np.zeros(sel.size + 1, dtype=np.int64)
    np.cumsum(sel, out=kept[1:])
    indptr = kept[reach.indptr]
    del kept
    a = sp.csr_array(
        (np.ones(int(indptr[-1]), dtype=np.float32), reach.indices[sel], indptr), shape=(n, n)
    )
    del sel
    a = (a + sp.csr_array((np.ones(own.size, dtype=np.float32), (own, own)), shape=(n, n))).tocsr()
    a.sum_duplicates()
    link = sp.identity(n, dtype=np.float32, format="csr")
    if gap is not None and gap > 0:
        if gap > graph.max_distance + 1e-9:
            raise InputError(f"the graph holds pairs up to {graph.max_distance:g} m, not {gap:g} m")
        # a gap a hair beyond the graph (within rounding) keeps every pair it holds
        near = graph.within(min(gap, graph.max_distance), closed=gap > graph.max_distance)
        g_rows = np.repeat(np.arange(n, dtype=np.int64), np.diff(near.indptr))
        g_cols = near.indices.astype(np.int64)
        g_sel = eligible[g_rows] & eligible[g_cols]
        link = link + sp.csr_array(
            (np.ones(int(g_sel.sum()), dtype=np.float32), (g_rows[g_sel], g_cols[g_sel])),
            shape=(n, n),
        )
    # rows in blocks, so that the sparse products never hold more than a block's pairs
    a_t = a.T.tocsr()
    index_type = np.int32 if n < 2**31 else np.int64
    # The pairs go straight into one pair of arrays, so that memory is the pairs once plus
    # one block. The arrays are sized from every 16th row's pairs (a sixteenth of the work,
    # spread over the whole layer: the first rows of a layer sorted in space say little
    # about the rest) and grown only if a later block needs more than that estimate.
    sample = np.arange(0, n, _SAMPLE_STEP)
    estimate = int((a[sample] @ link @ a_t).nnz) * n / max(sample.size, 1)
    size = min(int(estimate * 1.05) + 1024, MAX_DEPENDENT_PAIRS)
    first = np.empty(size, index_type)
    second = np.empty(size, index_type)
    total = 0
    for start in range(0, n, _DEPENDENCE_ROWS):
        block = (a[start : start + _DEPENDENCE_ROWS] @ link @ a_t).tocoo()
        off = block.row + start != block.col
        m = int(off.sum())
        if total + m > MAX_DEPENDENT_PAIRS:
            raise InputError(
                f"more than {MAX_DEPENDENT_PAIRS:,} linked pairs: too many for joint probabilities"
            )
        if total + m > first.size:
            rows_done = min(start + _DEPENDENCE_ROWS, n)
            size = max(total + m, int((total + m) * n / rows_done * 1.05) + 1024)
            first = _grown(first, min(size, MAX_DEPENDENT_PAIRS), total)
            second = _grown(second, min(size, MAX_DEPENDENT_PAIRS), total)
        first[total : total + m] = block.row[off] + start
        second[total : total + m] = block.col[off]
        total += m
        del block, off
    del a_t
    first, second = first[:total], second[:total]
    if clusters is None:
        return first, second
    near = sp.csr_array((np.ones(first.size, dtype=np.float32), (first, second)), shape=(n, n))
    del first, second
    if clusters is not None:
        labels, codes = np.unique(np.asarray(clusters)[own], return_inverse=True)
        member = sp.csr_array(
            (np.ones(own.size, dtype=np.float32), (own, codes)), shape=(n, labels.size)
        )
        touched = (a @ member).tocsc()
        linked = int(sum(np.diff(touched.indptr) ** 2))
        if linked > MAX_DEPENDENT_PAIRS:
            raise InputError(
                f"units share saturation clusters in about {linked:,} pairs, too many for joint "
                "probabilities; use smaller clusters or fewer units"
            )
        near = near + (touched @ touched.T).tocsr()
    if near.nnz > MAX_DEPENDENT_PAIRS:
        raise InputError(f"{near.nnz:,} linked pairs are too many for joint probabilities")
    near = near.tocoo()
    off = near.row != near.col
    return near.row[off].astype(index_type), near.col[off].astype(index_type)
