"""Hot loops of the samplers, vectorised across draws.

Two pieces live here:

* ``sample_subsets``: uniformly random m-subsets for many draws at once, by
  taking the first m distinct values of an iid uniform integer sequence per
  draw. The distinct-prefix loop is a numba kernel with a numpy twin (a
  row-wise sort) chosen by the module switch ``SUBSET_ENGINE``.
* ``greedy_pack``: random sequential greedy packing for the "kept apart"
  design. Its step loop exists twice, a numba kernel looping over draws and
  steps and a numpy twin looping over steps only; both apply the same
  per-draw rule to the same candidate stream, so they give identical results.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np

from geoexp._engine import Engine, jit, resolve_engine
from geoexp.errors import DesignError

RUNNING, DONE, STUCK = 0, 1, 2

# Module-level switch for the subset sampler's loop ("numpy" forces the pure
# numpy twin everywhere, e.g. where numba is unavailable); draws are identical.
SUBSET_ENGINE: Engine = "auto"

# Extension blocks are never shorter than this, so a row that came up short
# does not need many rounds to finish.
_MIN_EXTENSION = 16
# A packing round that has not finished every draw after this many candidate
# blocks is a bug or a near-impossible design; stop instead of spinning.
_MAX_ROUNDS = 10_000


# ---------------------------------------------------------------------------
# first m distinct values of an iid uniform sequence
# ---------------------------------------------------------------------------


def stream_length(n: int, m: int) -> int:
    """Length of the iid sequence that very likely holds m distinct values of range(n).

    The number of iid draws T needed to see m distinct values is a sum of
    independent geometric waits with success probabilities (n - k) / n,
    k = 0..m-1, so E[T] and Var[T] are sums; the mean plus four standard
    deviations leaves short rows rare (they are extended, not redrawn).
    """
    if m <= 0:
        return 0
    k = np.arange(m, dtype=np.float64)
    p = (n - k) / n
    mean = float(np.sum(1.0 / p))
    var = float(np.sum((1.0 - p) / p**2))
    return int(math.ceil(mean + 4.0 * math.sqrt(var))) + 1


def distinct_prefix(
    x: np.ndarray, m_row: np.ndarray, n: int, engine: Literal["numba", "numpy"]
) -> tuple[np.ndarray, np.ndarray]:
    """Mark, per row of ``x``, the first occurrences of its first ``m_row`` distinct values.

    ``x`` holds values in range(n). Returns ``(keep, found)``: ``keep`` is a
    boolean mask the shape of ``x`` and ``found[r] = min(m_row[r], number of
    distinct values in row r)``. Both engines return identical arrays.
    """
    if engine == "numba":
        keep = np.zeros(x.shape, dtype=np.bool_)
        found = np.zeros(x.shape[0], dtype=np.int64)
        jit(_distinct_prefix_loops)(x, np.ascontiguousarray(m_row, np.int64), n, keep, found)
        return keep, found
    return _distinct_prefix_numpy(x, m_row)


def _distinct_prefix_numpy(x: np.ndarray, m_row: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Numpy twin of the distinct-prefix loop: one row-wise sort."""
    n_rows, length = x.shape
    if length == 0:
        return np.zeros(x.shape, dtype=bool), np.zeros(n_rows, dtype=np.int64)
    # value * L + position sorts by value and, within a value, by position, so
    # after one plain (fast, unstable) sort the first entry of each value run
    # is that value's first occurrence.
    keys = x.astype(np.int64) * length + np.arange(length, dtype=np.int64)
    keys.sort(axis=1)
    values = keys // length
    first = np.empty(keys.shape, dtype=bool)
    first[:, 0] = True
    np.not_equal(values[:, 1:], values[:, :-1], out=first[:, 1:])
    rows, cols = np.nonzero(first)
    is_first = np.zeros(keys.shape, dtype=bool)
    is_first[rows, keys[rows, cols] - values[rows, cols] * length] = True
    rank = np.cumsum(is_first, axis=1, dtype=np.int64)
    keep = is_first & (rank <= m_row[:, None])
    found = np.minimum(rank[:, -1], m_row)
    return keep, found


def sample_subsets(
    main: np.random.Generator,
    extension: np.random.Generator,
    n: int,
    m_row: np.ndarray,
    engine: Engine | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Draw, for each row r, a uniformly random subset of size ``m_row[r]`` of range(n).

    Rows with ``m_row > n / 2`` choose their complement (the units left out)
    and invert it. Returns flat ``(rows, values)`` grouped by row in row
    order (values within a row in no set order). ``engine`` (default: the module switch
    ``SUBSET_ENGINE``) picks the distinct-prefix loop; results are identical.
    """
    engine = resolve_engine(SUBSET_ENGINE if engine is None else engine)
    m_row = np.asarray(m_row, dtype=np.int64)
    n_rows = m_row.size
    flip = 2 * m_row > n
    m_eff = np.where(flip, n - m_row, m_row)
    m_max = int(m_eff.max(initial=0))
    reordered = False
    if m_max > 0:
        length = stream_length(n, m_max)
        x = main.integers(0, n, size=(n_rows, length), dtype=np.int32)
        keep, found = distinct_prefix(x, m_eff, n, engine)
        complete = found >= m_eff
        # boolean-mask gathers are row-major, so rows come out grouped and in order
        rows = np.repeat(np.arange(n_rows, dtype=np.int64), found)
        vals = x[keep]
        short = np.flatnonzero(~complete)
        if short.size:
            # Short rows keep their sequence and read on (never restart): a
            # restart would favour subsets that are quick to collect.
            ok = complete[rows]
            chosen_rows, chosen_vals = [rows[ok]], [vals[ok]]
            seq, need = x[short], m_eff[short]
            extra_length = max(length // 4, _MIN_EXTENSION)
            while short.size:
                more = extension.integers(0, n, size=(short.size, extra_length), dtype=np.int32)
                seq = np.concatenate([seq, more], axis=1)
                keep_s, found_s = distinct_prefix(seq, need, n, engine)
                done = found_s >= need
                chosen_rows.append(np.repeat(short[done], found_s[done]))
                chosen_vals.append(seq[done][keep_s[done]])
                short, seq, need = short[~done], seq[~done], need[~done]
            rows = np.concatenate(chosen_rows)
            vals = np.concatenate(chosen_vals)
            reordered = True
    else:
        rows = np.zeros(0, dtype=np.int64)
        vals = np.zeros(0, dtype=np.int32)
    flipped = np.flatnonzero(flip)
    if flipped.size:
        inside = np.zeros((n_rows, n), dtype=bool)
        inside[flipped] = True
        sel = flip[rows]
        inside.reshape(-1)[rows[sel] * n + vals[sel]] = False
        rows_f, vals_f = np.nonzero(inside)
        rows = np.concatenate([rows[~sel], rows_f])
        vals = np.concatenate([vals[~sel], vals_f.astype(np.int32)])
        reordered = True
    if reordered:
        order = np.argsort(rows, kind="stable")
        rows, vals = rows[order], vals[order]
    return rows, vals


# ---------------------------------------------------------------------------
# random sequential greedy packing
# ---------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class PackingProblem:
    """Everything the packing step loop reads, in eligible-local numbering."""

    nbr_ptr: np.ndarray  # int64 (n_e + 1,)
    nbr_idx: np.ndarray  # int32 (nnz,)
    block: np.ndarray  # int32 (n_e,) block code of each eligible unit
    quota: np.ndarray  # int64 (B,)
    block_size: np.ndarray  # int64 (B,)

    @property
    def n(self) -> int:
        return self.block.size

    @property
    def total(self) -> int:
        return int(self.quota.sum())


@dataclass
class PackingState:
    """Mutable per-chunk working state; rows are draws of the chunk."""

    marks: np.ndarray  # bool (A, n_e): accepted or blocked
    counts: np.ndarray  # int64 (A, B): accepted per block
    avail: np.ndarray  # int64 (A, B): unmarked units per block
    accepted: np.ndarray  # int32 (A, total): accepted units in order of acceptance
    n_acc: np.ndarray  # int64 (A,)
    status: np.ndarray  # int8 (A,)

    @classmethod
    def empty(cls, n_draws: int, problem: PackingProblem) -> PackingState:
        return cls(
            marks=np.zeros((n_draws, problem.n), dtype=np.bool_),
            counts=np.zeros((n_draws, problem.quota.size), dtype=np.int64),
            avail=np.tile(problem.block_size, (n_draws, 1)),
            accepted=np.zeros((n_draws, problem.total), dtype=np.int32),
            n_acc=np.zeros(n_draws, dtype=np.int64),
            status=np.zeros(n_draws, dtype=np.int8),
        )

    def reset(self, rows: np.ndarray, problem: PackingProblem) -> None:
        self.marks[rows] = False
        self.counts[rows] = 0
        self.avail[rows] = problem.block_size
        self.n_acc[rows] = 0
        self.status[rows] = RUNNING


def _pack_round_numpy(
    cand: np.ndarray, live: np.ndarray, problem: PackingProblem, state: PackingState
) -> None:
    """Numpy twin: loop over steps, vectorised across the live draws."""
    quota = problem.quota
    block = problem.block
    degree = np.diff(problem.nbr_ptr)
    total = problem.total
    rows = live.copy()
    local = np.arange(live.size)
    for t in range(cand.shape[1]):
        if rows.size == 0:
            break
        c = cand[local, t]
        b = block[c]
        ok = ~state.marks[rows, c] & (state.counts[rows, b] < quota[b])
        if not ok.any():
            continue
        hit = np.flatnonzero(ok)
        ra, ca, ba = rows[hit], c[hit], b[hit]
        # each draw appears once per step, so these scatters never collide
        state.accepted[ra, state.n_acc[ra]] = ca
        state.n_acc[ra] += 1
        state.counts[ra, ba] += 1
        deg = degree[ca]
        starts = np.repeat(problem.nbr_ptr[ca] - np.cumsum(deg) + deg, deg)
        nbr = problem.nbr_idx[starts + np.arange(starts.size)]
        mr = np.concatenate([ra, np.repeat(ra, deg)])
        mc = np.concatenate([ca, nbr])
        # within one draw a unit and its neighbours are distinct (no self
        # loops, no duplicate neighbours), so "new" is read before any write
        new = ~state.marks[mr, mc]
        mr, mc = mr[new], mc[new]
        state.marks[mr, mc] = True
        np.subtract.at(state.avail, (mr, block[mc]), 1)
        done = state.n_acc[ra] == total
        stuck = ~done & ((state.counts[ra] < quota) & (state.avail[ra] == 0)).any(axis=1)
        state.status[ra[done]] = DONE
        state.status[ra[stuck]] = STUCK
        finished = done | stuck
        if finished.any():
            stay = np.ones(rows.size, dtype=bool)
            stay[hit[finished]] = False
            rows, local = rows[stay], local[stay]


def _pack_round_loops(
    cand, live, nbr_ptr, nbr_idx, block, quota, marks, counts, avail, accepted, n_acc, status
):
    """Numba body: loop over draws and steps; same rule as the numpy twin."""
    total = quota.sum()
    n_blocks = quota.size
    for i in range(live.size):
        a = live[i]
        for t in range(cand.shape[1]):
            c = cand[i, t]
            if marks[a, c]:
                continue
            b = block[c]
            if counts[a, b] >= quota[b]:
                continue
            accepted[a, n_acc[a]] = c
            n_acc[a] += 1
            counts[a, b] += 1
            marks[a, c] = True
            avail[a, b] -= 1
            for p in range(nbr_ptr[c], nbr_ptr[c + 1]):
                u = nbr_idx[p]
                if not marks[a, u]:
                    marks[a, u] = True
                    avail[a, block[u]] -= 1
            if n_acc[a] == total:
                status[a] = 1
                break
            for bb in range(n_blocks):
                if counts[a, bb] < quota[bb] and avail[a, bb] == 0:
                    status[a] = 2
                    break
            if status[a] == 2:
                break


def _distinct_prefix_loops(x, m_row, n, keep, found):
    """Numba body: first ``m_row`` distinct values per row with a reusable seen-mask."""
    seen = np.zeros(n, dtype=np.bool_)
    for r in range(x.shape[0]):
        k = 0
        t = 0
        while t < x.shape[1] and k < m_row[r]:
            v = x[r, t]
            if not seen[v]:
                seen[v] = True
                keep[r, t] = True
                k += 1
            t += 1
        # unset only what this row set, so a row costs O(its length), not O(n)
        for s in range(t):
            if keep[r, s]:
                seen[x[r, s]] = False
        found[r] = k


def greedy_pack(
    problem: PackingProblem,
    n_draws: int,
    main: np.random.Generator,
    extension: np.random.Generator,
    block_length: int,
    *,
    retry: bool,
    engine: Literal["numba", "numpy"],
) -> PackingState:
    """Run random sequential greedy packing for ``n_draws`` draws.

    Round 1 gives every draw ``block_length`` iid uniform candidates from
    ``main``; later rounds give the draws still running (ascending draw
    order) a further block from ``extension``. With ``retry`` a draw that got
    stuck is reset and starts again on its next block (rejection: the result
    is greedy packing conditioned on reaching the quotas); without it, stuck
    draws stay stuck (the feasibility pilot uses this).
    """
    state = PackingState.empty(n_draws, problem)
    pending = np.arange(n_draws)
    generator = main
    kernel = jit(_pack_round_loops) if engine == "numba" else None
    for _ in range(_MAX_ROUNDS):
        if pending.size == 0:
            return state
        cand = generator.integers(0, problem.n, size=(pending.size, block_length), dtype=np.int32)
        if kernel is not None:
            kernel(
                cand,
                pending,
                problem.nbr_ptr,
                problem.nbr_idx,
                problem.block,
                problem.quota,
                state.marks,
                state.counts,
                state.avail,
                state.accepted,
                state.n_acc,
                state.status,
            )
        else:
            _pack_round_numpy(cand, pending, problem, state)
        status = state.status[pending]
        if retry:
            stuck = pending[status == STUCK]
            state.reset(stuck, problem)
            pending = pending[status != DONE]
        else:
            pending = pending[status == RUNNING]
        generator = extension
    raise DesignError(
        f"greedy packing did not finish after {_MAX_ROUNDS} candidate blocks; "
        "the design is very close to infeasible (choose fewer treated units or a smaller gap)"
    )
