"""Scatter kernels: exposure conditions of many draws, touching only treated units' neighbours.

Two engines compute exactly the same integers: a numba loop (fast, the
default when numba imports) and a pure-numpy twin that processes a chunk of
draws at once (the counts by writing (draw, neighbour, band) triples into a
scratch, the condition bits by sparse products of the draws with the graph's
bands, see :func:`_condition_bits_numpy`). Both visit, for each draw, only the
graph rows of that draw's treated units, so the work per draw is proportional
to the treated units' neighbour lists, never to the number of units.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from geoexp._engine import (
    Engine,
    compile_kernels,
    compute_threads,
    jit,
    numba_module,
    resolve_engine,
)
from geoexp.exposure._reach import band_codes

# Largest number of (draw, neighbour) triples the numpy twin holds at once.
_TRIPLES_PER_CHUNK = 4_000_000


def _spread_impl(start, stop, d_indices, g_indptr, g_indices, g_code, best, touched, pc):
    """One draw: the smallest band code reached at each untreated neighbour of its treated units.

    Treated units are marked with code 0, which no band reaches below. Units
    reached for the first time are listed in ``touched``; returns how many.
    """
    for a in range(start, stop):
        best[d_indices[a]] = 0
    n_touched = 0
    for a in range(start, stop):
        t_unit = d_indices[a]
        for b in range(g_indptr[t_unit], g_indptr[t_unit + 1]):
            j = g_indices[b]
            c = g_code[b]
            if c < best[j]:
                if best[j] == pc:
                    touched[n_touched] = j
                    n_touched += 1
                best[j] = c
    return n_touched


def _scatter_numba_impl(
    d_indptr, d_indices, g_indptr, g_indices, g_code, counts_t, cov, cov_sums, cond_counts
):
    n_threads, n_units, n_cond = counts_t.shape
    pc = n_cond - 1
    n_draws = d_indptr.shape[0] - 1
    n_cov = cov.shape[1]
    track = cond_counts.shape[0] > 0
    # draws are split into contiguous blocks, one per thread, each with its own
    # scratch and count array; integer counts summed afterwards are exact, and
    # per-draw sums are made by one thread in the serial order, so the result
    # does not depend on the number of threads
    for t in numba.prange(n_threads):
        counts = counts_t[t]
        best = np.full(n_units, pc, np.int8)
        touched = np.empty(n_units, np.int64)
        r0 = n_draws * t // n_threads
        r1 = n_draws * (t + 1) // n_threads
        for r in range(r0, r1):
            start, stop = d_indptr[r], d_indptr[r + 1]
            n_touched = _spread(
                start, stop, d_indices, g_indptr, g_indices, g_code, best, touched, pc
            )
            for a in range(start, stop):
                t_unit = d_indices[a]
                counts[t_unit, 0] += 1
                if track:
                    cond_counts[r, 0] += 1
                    for q in range(n_cov):
                        cov_sums[r, 0, q] += cov[t_unit, q]
                best[t_unit] = pc
            for s in range(n_touched):
                j = touched[s]
                c = best[j]
                counts[j, c] += 1
                if track:
                    cond_counts[r, c] += 1
                    for q in range(n_cov):
                        cov_sums[r, c, q] += cov[j, q]
                best[j] = pc


def _scatter_blocked_impl(
    d_indptr, d_indices, g_indptr, g_indices, g_code, counts_t, cov, cov_sums, cond_counts, active
):
    n_threads, n_units, n_cond = counts_t.shape
    pc = n_cond - 1
    n_draws = d_indptr.shape[0] - 1
    n_cov = cov.shape[1]
    track = cond_counts.shape[0] > 0
    n_blocks = (n_draws + 63) // 64
    one = np.uint64(1)
    # Blocks of 64 draws, one bit each: a unit's row of the graph is read once per block
    # for every draw of the block that treats it (not once per draw), in ascending unit
    # order. Each block is done by one thread and every per-draw sum adds its units in
    # ascending position, so results do not depend on the number of threads.
    for t in numba.prange(n_threads):
        counts = counts_t[t]
        masks = np.zeros((n_units, pc), np.uint64)  # col 0 treated, col c reached in band c
        mark = np.zeros(n_units, np.int8)
        touched = np.empty(n_units, np.int64)
        b0 = n_blocks * t // n_threads
        b1 = n_blocks * (t + 1) // n_threads
        for blk in range(b0, b1):
            r0 = blk * 64
            r1 = min(r0 + 64, n_draws)
            n_touched = 0
            for r in range(r0, r1):
                bit = one << np.uint64(r - r0)
                for a in range(d_indptr[r], d_indptr[r + 1]):
                    u = d_indices[a]
                    if mark[u] == 0:
                        mark[u] = 1
                        touched[n_touched] = u
                        n_touched += 1
                    masks[u, 0] |= bit
            n_treated = n_touched
            for s in range(n_treated):
                u = touched[s]
                m = masks[u, 0]
                for b in range(g_indptr[u], g_indptr[u + 1]):
                    c = g_code[b]
                    if c < pc:
                        j = g_indices[b]
                        if mark[j] == 0:
                            mark[j] = 1
                            touched[n_touched] = j
                            n_touched += 1
                        masks[j, c] |= m
            if n_touched * 16 < n_units:
                order = np.sort(touched[:n_touched])
            else:  # most units touched: a scan is cheaper than a sort
                order = np.flatnonzero(mark)
            for j in order:
                seen = np.uint64(0)
                for c in range(pc):
                    m = masks[j, c] & ~seen
                    seen |= masks[j, c]
                    masks[j, c] = 0
                    if m == 0:
                        continue
                    counts[j, c] += _popcount(m)
                    if track:
                        while m != 0:
                            r = r0 + _popcount((m & (~m + one)) - one)
                            cond_counts[r, c] += 1
                            # adding an exact zero to a sum that starts at +0.0 leaves it as it
                            # is, so zero weights are skipped with the very same result
                            if active[j]:
                                for q in range(n_cov):
                                    v = cov[j, q]
                                    if v != 0.0:
                                        cov_sums[r, c, q] += v
                            m &= m - one
                mark[j] = 0


def _gather_rows(indptr: np.ndarray, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Positions into a CSR's data for the given rows, and the row-entry each came from."""
    starts = indptr[rows]
    lengths = indptr[rows + 1] - starts
    owner = np.repeat(np.arange(rows.size), lengths)
    offsets = np.arange(owner.size) - np.repeat(np.cumsum(lengths) - lengths, lengths)
    return starts[owner] + offsets, owner


class _Scratch:
    """Reusable per-(draw, unit) scratch of the numpy twin, reset after each use."""

    def __init__(self, size: int, pc: int) -> None:
        self.best = np.full(size, pc, dtype=np.int8)
        self.owner = np.empty(size, dtype=np.int32)
        self.pc = pc


def touched_codes_numpy(
    d_indptr: np.ndarray,
    d_indices: np.ndarray,
    g_indptr: np.ndarray,
    g_indices: np.ndarray,
    g_code: np.ndarray,
    n_units: int,
    n_cond: int,
    scratch: _Scratch | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Untreated units reached by a chunk of draws: (draw, unit, condition code), unique pairs.

    Pure numpy, no sort: the smallest code of each (draw, unit) is found by
    writing the codes into a (draw, unit) scratch from the outermost band
    inwards (within one write every value is the same, so repeated keys do not
    matter), then one entry per key is kept by an owner write (whichever
    duplicate wins, exactly one does). Only the entries written are reset.
    The pairs come in no particular order.
    """
    pc = n_cond - 1
    n_draws = d_indptr.size - 1
    size = n_draws * n_units
    if scratch is None or scratch.best.size < size:
        scratch = _Scratch(size, pc)
    best, owner = scratch.best, scratch.owner
    draw_of = np.repeat(np.arange(n_draws, dtype=np.int64), np.diff(d_indptr))
    data_pos, row = _gather_rows(g_indptr, d_indices.astype(np.int64))
    code = g_code[data_pos]
    keep = code < pc
    code = code[keep]
    reached = draw_of[row[keep]] * n_units + g_indices[data_pos[keep]]
    key = reached
    for c in range(pc - 1, 0, -1):
        best[key[code == c]] = c
    treated_key = draw_of * n_units + d_indices
    best[treated_key] = 0
    win = np.flatnonzero(best[key] == code)
    key, code = key[win], code[win]
    owner[key] = np.arange(key.size)
    first = owner[key] == np.arange(key.size)
    key, code = key[first], code[first]
    # reset every entry written, including those that lost to a nearer band or to treatment
    best[reached] = pc
    best[treated_key] = pc
    return key // n_units, key % n_units, code.astype(np.int64)


# Largest (draw, unit) scratch of the numpy twin, in entries (5 bytes each).
_SCRATCH_ENTRIES = 8_000_000


def _scatter_numpy(
    d_indptr, d_indices, g_indptr, g_indices, g_code, counts, cov, cov_sums, cond_counts
):
    n_units, n_cond = counts.shape
    n_draws = d_indptr.size - 1
    if n_draws == 0 or d_indices.size == 0:
        return
    # work per draw = sum of its treated units' degrees; chunks hold a bounded number of
    # triples and a bounded (draw, unit) scratch
    work = np.concatenate(([0], np.cumsum(np.diff(g_indptr)[d_indices])))
    per_draw = work[d_indptr[1:]] - work[d_indptr[:-1]]
    cum = np.cumsum(per_draw)
    max_draws = max(1, _SCRATCH_ENTRIES // max(n_units, 1))
    scratch = _Scratch(max_draws * n_units, n_cond - 1)
    start = 0
    track = cond_counts.shape[0] > 0
    while start < n_draws:
        base = cum[start - 1] if start else 0
        stop = int(np.searchsorted(cum, base + _TRIPLES_PER_CHUNK, side="right"))
        stop = min(max(stop, start + 1), start + max_draws)
        sl = slice(d_indptr[start], d_indptr[stop])
        sub_indptr = d_indptr[start : stop + 1] - d_indptr[start]
        sub_indices = d_indices[sl]
        draw, unit, cond = touched_codes_numpy(
            sub_indptr, sub_indices, g_indptr, g_indices, g_code, n_units, n_cond, scratch
        )
        counts += np.bincount(unit * n_cond + cond, minlength=n_units * n_cond).reshape(
            n_units, n_cond
        )
        counts[:, 0] += np.bincount(sub_indices, minlength=n_units)
        if track:
            n_sub = stop - start
            # per-draw sums in the numba kernel's order: each draw's units (treated and
            # reached) in ascending position, added one by one from zero
            tdraw = np.repeat(np.arange(n_sub), np.diff(sub_indptr))
            draw = np.concatenate([draw, tdraw])
            unit = np.concatenate([unit, sub_indices.astype(np.int64)])
            cond = np.concatenate([cond, np.zeros(tdraw.size, dtype=np.int64)])
            order = np.argsort(draw * n_units + unit, kind="stable")
            key, unit = (draw * n_cond + cond)[order], unit[order]
            cond_counts[start:stop] += np.bincount(key, minlength=n_sub * n_cond).reshape(
                n_sub, n_cond
            )
            for q in range(cov.shape[1]):
                cov_sums[start:stop, :, q] += np.bincount(
                    key, weights=cov[unit, q], minlength=n_sub * n_cond
                ).reshape(n_sub, n_cond)
        start = stop


def _kernel_arrays(n_units, d_indptr, d_indices, g_indptr, g_indices, g_code):
    """The draws and graph arrays in the types the kernels read.

    Positions stay int32 when they fit, so the graph is not copied per chunk.
    """
    index_type = np.int32 if max(n_units, 1) < 2**31 else np.int64
    return (
        np.ascontiguousarray(d_indptr, dtype=np.int64),
        np.ascontiguousarray(d_indices, dtype=index_type),
        np.ascontiguousarray(g_indptr, dtype=np.int64),
        np.ascontiguousarray(g_indices, dtype=index_type),
        np.ascontiguousarray(g_code, dtype=np.int8),
    )


def scatter_counts(
    d_indptr: np.ndarray,
    d_indices: np.ndarray,
    g_indptr: np.ndarray,
    g_indices: np.ndarray,
    g_dist: np.ndarray,
    edges: np.ndarray,
    n_units: int,
    cov: np.ndarray | None = None,
    *,
    engine: Engine = "auto",
    g_code: np.ndarray | None = None,
    by_draw: bool = False,
) -> tuple[np.ndarray, np.ndarray | None, np.ndarray | None]:
    """Count, over a chunk of draws, how often each unit is treated or in each band.

    Returns ``counts`` (n_units, K+2) int64 with the pure-control column left
    at zero (it is the remainder, filled by the caller), and when ``cov`` is
    given, per-draw condition sizes (R, K+2) and covariate sums (R, K+2, q)
    for the conditions other than pure control; each per-draw sum adds its
    units in ascending position. ``g_code`` may pass :func:`band_codes` of
    ``(g_dist, edges)`` computed once for many chunks.

    The numba engine takes the draws 64 at a time, one bit each, so that a
    treated unit's graph row is read once per block of draws rather than once
    per draw. ``by_draw=True`` runs the earlier numba kernel instead, one draw
    at a time, whose sums add each draw's units in the order it visits them
    (the same counts; the same sums up to the order of the additions): kept as
    the reference the tests and the benchmark compare against.
    """
    edges = np.ascontiguousarray(edges, dtype=np.float64)
    n_cond = edges.size + 2
    n_draws = d_indptr.size - 1
    if g_code is None:
        g_code = band_codes(np.asarray(g_dist, dtype=np.float64), edges)
    if cov is None:
        cov_arr = np.zeros((n_units, 0))
        cov_sums = np.zeros((0, n_cond, 0))
        cond_counts = np.zeros((0, n_cond), dtype=np.int64)
    else:
        cov_arr = np.ascontiguousarray(cov, dtype=np.float64)
        cov_sums = np.zeros((n_draws, n_cond, cov_arr.shape[1]))
        cond_counts = np.zeros((n_draws, n_cond), dtype=np.int64)
    d_indptr, d_indices, g_indptr, g_indices, g_code = _kernel_arrays(
        n_units, d_indptr, d_indices, g_indptr, g_indices, g_code
    )
    if resolve_engine(engine) == "numba":
        kernel = _numba_kernel(_scatter_numba_impl if by_draw else _scatter_blocked_impl)
        arrays = (d_indptr, d_indices, g_indptr, g_indices, g_code)
        with compute_threads() as threads:
            n_threads = max(1, min(threads, n_draws))
            counts_t = np.zeros((n_threads, n_units, n_cond), dtype=np.int64)
            if by_draw:
                kernel(*arrays, counts_t, cov_arr, cov_sums, cond_counts)
            else:
                active = (cov_arr != 0).any(axis=1).astype(np.int8)
                kernel(*arrays, counts_t, cov_arr, cov_sums, cond_counts, active)
        counts = counts_t.sum(axis=0) if n_threads > 1 else counts_t[0]
    else:
        counts = np.zeros((n_units, n_cond), dtype=np.int64)
        _scatter_numpy(
            d_indptr,
            d_indices,
            g_indptr,
            g_indices,
            g_code,
            counts,
            cov_arr,
            cov_sums,
            cond_counts,
        )
    if cov is None:
        return counts, None, None
    return counts, cond_counts, cov_sums


def _bits_numba_impl(
    d_indptr, d_indices, g_indptr, g_indices, g_code, column, draw0, bits, max_threads
):
    n_cond = bits.shape[0]
    pc = n_cond - 1
    n_units = column.shape[0]
    n_draws = d_indptr.shape[0] - 1
    if n_draws == 0:
        return
    one = np.uint64(1)
    # threads take whole 64-draw words, so no two threads write the same word; within a
    # word the draws go together, one bit each, so that a treated unit's graph row is read
    # once per word for every draw of the word that treats it
    first_word = draw0 // 64
    n_w = (draw0 + n_draws - 1) // 64 - first_word + 1
    n_threads = min(max_threads, n_w)
    for t in numba.prange(n_threads):
        w0 = first_word + n_w * t // n_threads
        w1 = first_word + n_w * (t + 1) // n_threads
        masks = np.zeros((n_units, pc), np.uint64)  # col 0 treated, col c reached in band c
        mark = np.zeros(n_units, np.int8)
        touched = np.empty(n_units, np.int64)
        for w in range(w0, w1):
            r0 = max(w * 64 - draw0, 0)
            r1 = min((w + 1) * 64 - draw0, n_draws)
            n_touched = 0
            for r in range(r0, r1):
                bit = one << np.uint64((draw0 + r) % 64)
                for a in range(d_indptr[r], d_indptr[r + 1]):
                    u = d_indices[a]
                    if mark[u] == 0:
                        mark[u] = 1
                        touched[n_touched] = u
                        n_touched += 1
                    masks[u, 0] |= bit
            n_treated = n_touched
            for s in range(n_treated):
                u = touched[s]
                m = masks[u, 0]
                for b in range(g_indptr[u], g_indptr[u + 1]):
                    c = g_code[b]
                    if c < pc:
                        j = g_indices[b]
                        if mark[j] == 0:
                            mark[j] = 1
                            touched[n_touched] = j
                            n_touched += 1
                        masks[j, c] |= m
            for s in range(n_touched):
                j = touched[s]
                col = column[j]
                seen = np.uint64(0)
                for c in range(pc):
                    m = masks[j, c] & ~seen
                    seen |= masks[j, c]
                    masks[j, c] = 0
                    if col >= 0 and m != 0:
                        bits[c, col, w] |= m
                mark[j] = 0


def _popcount64(x):
    # SWAR population count (LLVM turns it into the popcnt instruction where there is one)
    x = x - ((x >> np.uint64(1)) & np.uint64(0x5555555555555555))
    x = (x & np.uint64(0x3333333333333333)) + ((x >> np.uint64(2)) & np.uint64(0x3333333333333333))
    x = (x + (x >> np.uint64(4))) & np.uint64(0x0F0F0F0F0F0F0F0F)
    return (x * np.uint64(0x0101010101010101)) >> np.uint64(56)


def _pair_popcounts_impl(a_bits, b_bits, first, second, out):
    n_words = a_bits.shape[1]
    for p in numba.prange(first.shape[0]):
        i = first[p]
        j = second[p]
        total = np.uint64(0)
        for w in range(n_words):
            total += _popcount(a_bits[i, w] & b_bits[j, w])
        out[p] = total


def _numba_kernel(impl):
    """The numba version of a parallel kernel, compiled on first use with its inline helpers."""
    global numba
    numba = numba_module()
    compile_kernels(globals(), ("_spread", "_popcount"), inline=True)
    return jit(impl, parallel=True)


# The kernels call these helpers, and read ``numba.prange``, as module globals: they are
# replaced by compiled versions (and the numba module) just before a kernel first compiles.
_spread = _spread_impl
_popcount = _popcount64
numba = None


def condition_bits_chunk(
    d_indptr: np.ndarray,
    d_indices: np.ndarray,
    g_indptr: np.ndarray,
    g_indices: np.ndarray,
    g_code: np.ndarray,
    column: np.ndarray,
    draw0: int,
    bits: np.ndarray,
    *,
    engine: Engine = "auto",
) -> None:
    """Set the bits of draws ``draw0 ..`` of a chunk in ``bits`` (n_conditions, n_held, n_words).

    The layout is the final one (a row of words per unit): the kernel takes
    the draws of one 64-draw word together, so it writes each unit's word of a
    condition once.

    Sets the treated and band bits of the held units (``column[unit]`` is the
    unit's row, -1 if not held); pure-control bits are the complement, set
    by the caller once all draws are in. Writes ``bits`` in place (it is the
    caller's scratch). Both engines set exactly the same bits.
    """
    n_units = column.size
    d_indptr, d_indices, g_indptr, g_indices, g_code = _kernel_arrays(
        n_units, d_indptr, d_indices, g_indptr, g_indices, g_code
    )
    column = np.ascontiguousarray(column, dtype=np.int64)
    if resolve_engine(engine) == "numba":
        kernel = _numba_kernel(_bits_numba_impl)
        with compute_threads() as threads:
            kernel(
                d_indptr, d_indices, g_indptr, g_indices, g_code, column, int(draw0), bits, threads
            )
        return
    _condition_bits_numpy(d_indptr, d_indices, g_indptr, g_indices, g_code, column, draw0, bits)


# Draws per step of the numpy twin of the condition-bits kernel: half a 64-bit word, so
# that a float64 bincount adds distinct powers of two below 2**32, which it does exactly.
_HALF_WORD = 32


def _band_matrices(
    g_indptr: np.ndarray, g_indices: np.ndarray, g_code: np.ndarray, n_units: int, n_cond: int
) -> list:
    """The reach graph split by band: one 0/1 CSR (n_units, n_units) per band code 1..K."""
    row = np.repeat(np.arange(n_units, dtype=g_indices.dtype), np.diff(g_indptr))
    out = []
    for c in range(1, n_cond - 1):
        keep = g_code == c
        indptr = np.zeros(n_units + 1, dtype=np.int64)
        np.cumsum(np.bincount(row[keep], minlength=n_units), out=indptr[1:])
        ones = np.ones(int(indptr[-1]), dtype=np.int32)  # int32: no count wraps to zero
        out.append(sp.csr_array((ones, g_indices[keep], indptr), shape=(n_units, n_units)))
    return out


def _half_word(
    weight: np.ndarray, indptr: np.ndarray, units: np.ndarray, n_units: int
) -> np.ndarray:
    """Per unit, the sum of ``weight[r]`` over the rows r of a CSR that list it (as uint64)."""
    total = np.bincount(units, weights=np.repeat(weight, np.diff(indptr)), minlength=n_units)
    return total.astype(np.uint64)


def _condition_bits_numpy(d_indptr, d_indices, g_indptr, g_indices, g_code, column, draw0, bits):
    """Numpy twin of the condition-bits kernel: sparse products and bincounts, no scatter.

    For a step of at most 32 draws within one half-word, the product of the
    draws' treatment indicators (draws x units) with the band-c part of the
    graph lists, per draw, each unit with a treated unit in band c once (the
    product adds duplicates up). So the bits of a half-word are the bincount
    of those units with weight 2**bit, exact in float64. A unit's condition is
    the nearest band reached, so band c keeps the units reached in band c and
    neither treated nor reached in a nearer band: the same bits as the loop.
    """
    n_cond, n_held, _ = bits.shape
    n_units = column.size
    n_draws = d_indptr.size - 1
    bands = _band_matrices(g_indptr, g_indices, g_code, n_units, n_cond)
    held = column >= 0
    every = n_held == n_units and np.array_equal(column, np.arange(n_units))
    units_of_rows = np.empty(n_held, dtype=np.int64)
    units_of_rows[column[held]] = np.flatnonzero(held)
    start = 0
    while start < n_draws:
        g0 = draw0 + start
        stop = min(n_draws, start + _HALF_WORD - g0 % _HALF_WORD)
        word, shift = divmod(g0, 2 * _HALF_WORD)
        shift = np.uint64(shift - shift % _HALF_WORD)
        weight = np.ldexp(1.0, (np.arange(start, stop) + draw0) % _HALF_WORD)
        indptr = d_indptr[start : stop + 1] - d_indptr[start]
        treated = d_indices[d_indptr[start] : d_indptr[stop]]
        draws = sp.csr_array(
            (np.ones(treated.size, dtype=np.int32), treated, indptr), shape=(stop - start, n_units)
        )
        # a draw lists each treated unit once (Draws: ascending positions), so this adds no bit twice
        seen = _half_word(weight, indptr, treated, n_units)
        found = [seen]
        for band in bands:
            reached = draws @ band
            now = _half_word(weight, reached.indptr, reached.indices, n_units)
            found.append(now & ~seen)
            seen = seen | now  # not in place: found[0] is the treated half-word
        for c, half in enumerate(found):
            bits[c, :, word] |= (half if every else half[units_of_rows]) << shift
        start = stop


def pair_popcounts(
    a_bits: np.ndarray,
    b_bits: np.ndarray,
    first: np.ndarray,
    second: np.ndarray,
    *,
    engine: Engine = "auto",
    block: int = 65_536,
) -> np.ndarray:
    """popcount(a_bits[first[p]] & b_bits[second[p]]) for every pair p, as int64.

    The numba engine reads the two rows of each pair in place (memory: the
    output only); the numpy twin gathers ``block`` pairs at a time (memory:
    block * words * 16 bytes). Both count exactly.
    """
    first = np.ascontiguousarray(first, dtype=np.int64)
    second = np.ascontiguousarray(second, dtype=np.int64)
    out = np.empty(first.size, dtype=np.int64)
    if resolve_engine(engine) == "numba":
        kernel = _numba_kernel(_pair_popcounts_impl)
        with compute_threads():
            kernel(np.ascontiguousarray(a_bits), np.ascontiguousarray(b_bits), first, second, out)
        return out
    for s in range(0, first.size, block):
        a = a_bits[first[s : s + block]]
        b = b_bits[second[s : s + block]]
        out[s : s + a.shape[0]] = np.bitwise_count(a & b).sum(axis=1)
    return out
