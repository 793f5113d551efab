"""The linked-pair sums of the Aronow–Samii variance: one pass over the pairs, every outcome at once.

The conservative variance of Aronow & Samii (2017) over the linked pairs of a
contrast needs, for each pair (i, j) of units in the contrast's population,
the joint probabilities pi_ij(k, k), pi_ij(l, l) and pi_ij(k, l) of the
conditions the units were observed in, from the bit-packed indicators of the
design's draws. What depends on the joint probabilities (which pairs count,
their weights, the zero joint probabilities behind Young's terms) is the same
for every outcome vector: the Hajek residuals and the raw outcome of the
Horvitz–Thompson estimator share one pass.

The pairs are read where they are (positions into all units, any order) with
a map from unit to population position, so no restricted copy of the pairs is
made. The pair terms come out in pair order, one row per outcome vector, for
the caller to sum once: the sums are the very floating-point sums of the
earlier code that restricted the pairs first.

Two engines compute exactly the same numbers (:mod:`geoexp._engine`): a numba
kernel that splits the pairs into one contiguous range per thread, and a
numpy twin that goes through them in blocks.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from geoexp._engine import Engine, compile_kernels, jit, numba_module, resolve_engine, thread_count

# Pairs whose bit rows the numpy twin gathers at once (memory: pairs * words * 16 bytes).
_POPCOUNT_BLOCK = 65_536
# population codes: observed in the exposure condition k, in the reference l, or neither
_IN_K, _IN_L, _OTHER = 0, 1, 2


@dataclass(frozen=True)
class PairTerms:
    """The pair terms and zero counts of one contrast's linked pairs.

    Attributes
    ----------
    kk, ll, kl
        (n_outcomes, pairs) terms in pair order: pairs with both units in k
        (``(pi_ij - pi_i pi_j) / pi_ij * y_i / pi_i * y_j / pi_j`` with
        pi_ij(k, k)), both in l, and i in k with j in l (pi_ij(k, l)); zero
        where the joint probability is zero.
    zero_k, zero_l
        Per population position: the pairs leaving a unit observed in k (l)
        whose pi_ij(k, k) (pi_ij(l, l)) is zero.
    zero_kl_first, zero_kl_second
        Per population position: pairs with pi_ij(k, l) = 0 whose first unit
        is observed in k, and whose second unit is observed in l.
    """

    kk: np.ndarray
    ll: np.ndarray
    kl: np.ndarray
    zero_k: np.ndarray
    zero_l: np.ndarray
    zero_kl_first: np.ndarray
    zero_kl_second: np.ndarray


def pair_terms(
    first: np.ndarray,
    second: np.ndarray,
    where: np.ndarray,
    code: np.ndarray,
    rows: np.ndarray,
    bits_k: np.ndarray,
    bits_l: np.ndarray,
    pk: np.ndarray,
    pl: np.ndarray,
    ys: np.ndarray,
    n_draws: int,
    *,
    engine: Engine = "auto",
    block: int = 1 << 20,
) -> PairTerms:
    """Terms and zero counts of the linked pairs of a contrast, for several outcome vectors.

    Parameters
    ----------
    first, second
        The pairs (both orders of each), as values that ``where`` maps.
    where
        Population position of each value in the pairs, -1 outside the population.
    code
        Per population position: 0 observed in k, 1 observed in l, 2 neither.
    rows
        Per population position, its row in ``bits_k`` and ``bits_l``.
    bits_k, bits_l
        (rows, words) uint64 indicators of conditions k and l, one bit per draw.
    pk, pl
        Per population position, the probabilities of k and l.
    ys
        (n_outcomes, population) outcome vectors.
    n_draws
        The number of draws R behind the bits (pi_ij = popcount / R).
    engine
        "auto", "numba" or "numpy": the same numbers either way.
    block
        Pairs the numpy twin handles at once.

    Returns
    -------
    PairTerms
        See :class:`PairTerms`.
    """
    first = np.ascontiguousarray(first)
    second = np.ascontiguousarray(second)
    where = np.ascontiguousarray(where, dtype=np.int64)
    code = np.ascontiguousarray(code, dtype=np.int8)
    rows = np.ascontiguousarray(rows, dtype=np.int64)
    bits_k = np.ascontiguousarray(bits_k, dtype=np.uint64)
    bits_l = np.ascontiguousarray(bits_l, dtype=np.uint64)
    pk = np.ascontiguousarray(pk, dtype=np.float64)
    pl = np.ascontiguousarray(pl, dtype=np.float64)
    ys = np.ascontiguousarray(ys, dtype=np.float64)
    if resolve_engine(engine) == "numba":
        kernel = _numba_kernel()
        kk, ll, kl, zeros = kernel(
            first,
            second,
            where,
            code,
            rows,
            bits_k,
            bits_l,
            pk,
            pl,
            ys,
            np.int64(n_draws),
            np.int64(thread_count()),
        )
        return PairTerms(kk, ll, kl, zeros[0], zeros[1], zeros[2], zeros[3])
    return _pair_terms_numpy(
        first, second, where, code, rows, bits_k, bits_l, pk, pl, ys, n_draws, block
    )


def _popcounts(a_bits: np.ndarray, b_bits: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """popcount(a_bits[a[p]] & b_bits[b[p]]) for every pair p, in blocks of rows."""
    out = np.empty(a.size, dtype=np.int64)
    for s in range(0, a.size, _POPCOUNT_BLOCK):
        sa, sb = a[s : s + _POPCOUNT_BLOCK], b[s : s + _POPCOUNT_BLOCK]
        out[s : s + sa.size] = np.bitwise_count(a_bits[sa] & b_bits[sb]).sum(axis=1)
    return out


def _pair_terms_numpy(
    first: np.ndarray,
    second: np.ndarray,
    where: np.ndarray,
    code: np.ndarray,
    rows: np.ndarray,
    bits_k: np.ndarray,
    bits_l: np.ndarray,
    pk: np.ndarray,
    pl: np.ndarray,
    ys: np.ndarray,
    n_draws: int,
    block: int,
) -> PairTerms:
    """The numpy twin of the kernel: the pairs in blocks, the same expressions in the same order."""
    n = code.size
    m = ys.shape[0]
    zero_k = np.zeros(n, dtype=np.int64)
    zero_l = np.zeros(n, dtype=np.int64)
    zero_kl_first = np.zeros(n, dtype=np.int64)
    zero_kl_second = np.zeros(n, dtype=np.int64)
    kk: list[np.ndarray] = [np.empty((m, 0))]
    ll: list[np.ndarray] = [np.empty((m, 0))]
    kl: list[np.ndarray] = [np.empty((m, 0))]
    for s in range(0, first.size, block):
        ia = where[first[s : s + block]]
        ib = where[second[s : s + block]]
        keep = (ia >= 0) & (ib >= 0)
        ia, ib = ia[keep], ib[keep]
        ca, cb = code[ia], code[ib]
        for c, bits, p, zero, out in (
            (_IN_K, bits_k, pk, zero_k, kk),
            (_IN_L, bits_l, pl, zero_l, ll),
        ):
            sel = ca == c
            a, b = ia[sel], ib[sel]
            jz = _popcounts(bits, bits, rows[a], rows[b]) / n_draws
            zero += np.bincount(a[jz == 0], minlength=n)
            both = cb[sel] == c
            a, b, jj = a[both], b[both], jz[both]
            with np.errstate(invalid="ignore", divide="ignore"):
                coef = np.where(jj > 0, (jj - p[a] * p[b]) / jj, 0.0)
            out.append(coef * (ys[:, a] / p[a]) * (ys[:, b] / p[b]))
        # pi_ij(k, l) once for every pair with i in k or j in l; the sums take subsets
        in_k, in_l = ca == _IN_K, cb == _IN_L
        either = in_k | in_l
        a, b = ia[either], ib[either]
        jkl = _popcounts(bits_k, bits_l, rows[a], rows[b]) / n_draws
        in_k, in_l = in_k[either], in_l[either]
        zero_kl_first += np.bincount(a[in_k & (jkl == 0)], minlength=n)
        zero_kl_second += np.bincount(b[in_l & (jkl == 0)], minlength=n)
        both = in_k & in_l
        a, b, jj = a[both], b[both], jkl[both]
        with np.errstate(invalid="ignore", divide="ignore"):
            coef = np.where(jj > 0, (jj - pk[a] * pl[b]) / jj, 0.0)
        kl.append(coef * ys[:, a] / pk[a] * ys[:, b] / pl[b])
    return PairTerms(
        np.concatenate(kk, axis=1),
        np.concatenate(ll, axis=1),
        np.concatenate(kl, axis=1),
        zero_k,
        zero_l,
        zero_kl_first,
        zero_kl_second,
    )


def _popcount64(x):
    # SWAR population count (LLVM turns it into the popcnt instruction where there is one)
    x = x - ((x >> np.uint64(1)) & np.uint64(0x5555555555555555))
    x = (x & np.uint64(0x3333333333333333)) + ((x >> np.uint64(2)) & np.uint64(0x3333333333333333))
    x = (x + (x >> np.uint64(4))) & np.uint64(0x0F0F0F0F0F0F0F0F)
    return (x * np.uint64(0x0101010101010101)) >> np.uint64(56)


def _joint_count(a_bits, i, b_bits, j):
    total = np.uint64(0)
    for w in range(a_bits.shape[1]):
        total += _popcount(a_bits[i, w] & b_bits[j, w])
    return total


def _overlap(a_bits, i, b_bits, j):
    # whether rows i and j share a draw: most linked pairs do within the first words, so
    # the zero tests that need no count stop early
    for w in range(a_bits.shape[1]):
        if a_bits[i, w] & b_bits[j, w]:
            return True
    return False


def _pair_terms_impl(
    first, second, where, code, rows, bits_k, bits_l, pk, pl, ys, n_draws, n_threads
):
    n_pairs = first.shape[0]
    n = code.shape[0]
    m = ys.shape[0]
    r = np.float64(n_draws)
    # the pairs are split into one contiguous range per thread; each thread first counts its
    # terms, so that it writes them at their place in pair order, and keeps its own zero
    # counts (integers, summed exactly afterwards): the result does not depend on the threads
    sizes = np.zeros((n_threads + 1, 3), np.int64)
    for t in numba.prange(n_threads):
        p0 = n_pairs * t // n_threads
        p1 = n_pairs * (t + 1) // n_threads
        n_kk = n_ll = n_kl = 0
        for p in range(p0, p1):
            i = where[first[p]]
            if i < 0:
                continue
            j = where[second[p]]
            if j < 0:
                continue
            ci, cj = code[i], code[j]
            if ci == _IN_K:
                if cj == _IN_K:
                    n_kk += 1
                elif cj == _IN_L:
                    n_kl += 1
            elif ci == _IN_L and cj == _IN_L:
                n_ll += 1
        sizes[t + 1, 0] = n_kk
        sizes[t + 1, 1] = n_ll
        sizes[t + 1, 2] = n_kl
    for t in range(n_threads):
        sizes[t + 1] += sizes[t]
    kk = np.empty((m, sizes[n_threads, 0]), np.float64)
    ll = np.empty((m, sizes[n_threads, 1]), np.float64)
    kl = np.empty((m, sizes[n_threads, 2]), np.float64)
    zeros_t = np.zeros((n_threads, 4, n), np.int64)
    for t in numba.prange(n_threads):
        zeros = zeros_t[t]
        at_kk, at_ll, at_kl = sizes[t, 0], sizes[t, 1], sizes[t, 2]
        p0 = n_pairs * t // n_threads
        p1 = n_pairs * (t + 1) // n_threads
        for p in range(p0, p1):
            i = where[first[p]]
            if i < 0:
                continue
            j = where[second[p]]
            if j < 0:
                continue
            ci, cj = code[i], code[j]
            # the expressions and their order of operations are those of the numpy twin
            if ci == _IN_K:
                if cj == _IN_K:
                    jj = np.float64(_joint_count(bits_k, rows[i], bits_k, rows[j])) / r
                    if jj == 0:
                        zeros[0, i] += 1
                    coef = (jj - pk[i] * pk[j]) / jj if jj > 0 else 0.0
                    for o in range(m):
                        kk[o, at_kk] = coef * (ys[o, i] / pk[i]) * (ys[o, j] / pk[j])
                    at_kk += 1
                elif not _overlap(bits_k, rows[i], bits_k, rows[j]):
                    zeros[0, i] += 1
                if cj == _IN_L:
                    jkl = np.float64(_joint_count(bits_k, rows[i], bits_l, rows[j])) / r
                    if jkl == 0:
                        zeros[2, i] += 1
                        zeros[3, j] += 1
                    coef = (jkl - pk[i] * pl[j]) / jkl if jkl > 0 else 0.0
                    for o in range(m):
                        kl[o, at_kl] = coef * ys[o, i] / pk[i] * ys[o, j] / pl[j]
                    at_kl += 1
                elif not _overlap(bits_k, rows[i], bits_l, rows[j]):
                    zeros[2, i] += 1
            elif ci == _IN_L:
                if cj == _IN_L:
                    jj = np.float64(_joint_count(bits_l, rows[i], bits_l, rows[j])) / r
                    if jj == 0:
                        zeros[1, i] += 1
                    coef = (jj - pl[i] * pl[j]) / jj if jj > 0 else 0.0
                    for o in range(m):
                        ll[o, at_ll] = coef * (ys[o, i] / pl[i]) * (ys[o, j] / pl[j])
                    at_ll += 1
                    if not _overlap(bits_k, rows[i], bits_l, rows[j]):
                        zeros[3, j] += 1
                elif not _overlap(bits_l, rows[i], bits_l, rows[j]):
                    zeros[1, i] += 1
            elif cj == _IN_L and not _overlap(bits_k, rows[i], bits_l, rows[j]):
                zeros[3, j] += 1
    zeros = np.zeros((4, n), np.int64)
    for t in range(n_threads):
        zeros += zeros_t[t]
    return kk, ll, kl, zeros


def _numba_kernel():
    """The numba kernel, compiled on first use with its inline helpers."""
    global numba
    numba = numba_module()
    compile_kernels(globals(), ("_popcount", "_joint_count", "_overlap"), inline=True)
    return jit(_pair_terms_impl, parallel=True)


# The kernel calls these helpers, and reads ``numba.prange``, as module globals: they are
# replaced by compiled versions (and the numba module) just before the kernel first compiles.
_popcount = _popcount64
numba = None
