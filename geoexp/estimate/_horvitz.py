"""Horvitz–Thompson and Hajek estimators of exposure contrasts, with the conservative
variance estimator of Aronow & Samii (2017)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
import pandas as pd
from scipy.stats import norm

from geoexp._engine import compute_threads
from geoexp.errors import InputError
from geoexp.exposure import ConditionBits, kish_ess

Estimator = Literal["hajek", "horvitz-thompson"]

# Above this many entries in a dense block of joint probabilities, the estimator
# uses only the linked pairs of units (see variance_terms).
DENSE_LIMIT = 40_000_000
# Near pairs handled at once by the pairwise sums (memory: a few arrays of this length).
NEAR_BLOCK = 1 << 20


@dataclass(frozen=True)
class ContrastEstimate:
    """An estimated contrast tau = mu(exposure) - mu(reference) with its standard error.

    The sign convention: a reduction in incidents is negative, displacement
    (more incidents next door) is positive.
    """

    exposure: str
    reference: str
    estimator: str
    outcome: str
    estimate: float
    std_error: float
    ci_low: float
    ci_high: float
    mean_exposure: float
    mean_reference: float
    n_units: int
    n_exposure: int
    n_reference: int
    n_excluded: int
    level: float
    joint: str
    units: str = "every unit with positive probability of both conditions"
    ess_exposure: float = float("nan")
    ess_reference: float = float("nan")

    @property
    def contrast(self) -> str:
        """``"<exposure> vs <reference>"``."""
        return f"{self.exposure} vs {self.reference}"

    def __str__(self) -> str:
        pct = int(round(100 * self.level))
        return (
            f"{self.contrast} ({self.estimator}, {self.outcome}): {self.estimate:+.3f} "
            f"(SE {self.std_error:.3f}; {pct}% CI {self.ci_low:+.3f} to {self.ci_high:+.3f}); "
            f"{self.n_exposure:,} exposed and {self.n_reference:,} reference units observed of "
            f"{self.n_units:,} in the estimand ({self.units}), {self.n_excluded:,} excluded by "
            f"positivity; effective sample sizes {self.ess_exposure:.0f} and "
            f"{self.ess_reference:.0f} (Kish)"
        )

    def to_frame(self) -> pd.DataFrame:
        """One-row frame."""
        return pd.DataFrame([self.__dict__]).assign(contrast=self.contrast).set_index("contrast")


def _structural_zeros(near: tuple[np.ndarray, np.ndarray] | None, n: int):
    """Sparse boolean matrix of the pairs whose zero joint probability can be structural.

    The linked pairs, plus every unit with itself (pi_ii(k, l) = 0 for k != l).
    None when the linked pairs are not known.
    """
    if near is None:
        return None
    import scipy.sparse as sp

    a = np.concatenate([np.asarray(near[0], dtype=np.int64), np.arange(n)])
    b = np.concatenate([np.asarray(near[1], dtype=np.int64), np.arange(n)])
    return sp.csr_array((np.ones(a.size, dtype=bool), (a, b)), shape=(n, n))


def variance_terms(
    y: np.ndarray,
    observed: np.ndarray,
    k: int,
    l: int,
    pk: np.ndarray,
    pl: np.ndarray,
    bits: ConditionBits,
    rows: np.ndarray,
    near: tuple[np.ndarray, np.ndarray] | None = None,
) -> tuple[float, float, float, str]:
    """V[T(k)], V[T(l)] and C[T(k), T(l)] of Aronow & Samii (2017), conservative form.

    All arrays are over the contrast's population U (units with both
    probabilities positive); ``rows`` are their rows in ``bits``. Where a joint
    probability is zero the Young's-inequality terms of Aronow & Samii replace
    the unidentified covariance (pi_ii(k, l) = 0 for k != l always counts).

    When the dense blocks of joint probabilities would exceed
    :data:`DENSE_LIMIT` entries, only the pairs listed in ``near`` (positions
    into U, both orders; see :func:`geoexp.exposure.dependence_pairs`) enter
    the pairwise terms, and the other pairs are taken as independent
    (pi_ij = pi_i pi_j). Those pairs depend on each other only through the
    design's fixed totals. For the Horvitz–Thompson estimator of counts the
    dropped terms are negative for designs that fix the number treated, so the
    variance stays conservative; for the Hajek estimator (residuals summing to
    zero) the dropped terms add up to a small positive amount, of relative size
    about one over the number of units in a condition.
    """
    sk = np.flatnonzero(observed == k)
    sl = np.flatnonzero(observed == l)
    n = y.size
    wk = y[sk] / pk[sk]
    wl = y[sl] / pl[sl]
    vk = float(((1 - pk[sk]) * wk**2).sum())
    vl = float(((1 - pl[sl]) * wl**2).sum())
    dense = n * max(sk.size, sl.size, 1) <= DENSE_LIMIT
    if dense:
        joint = "all pairs"
        everyone = rows
        # With the design's linked pairs known, a zero joint probability of an unlinked pair
        # is Monte Carlo noise, not a structural zero: such pairs get no Young's term (they
        # are taken as independent). Without them, every zero counts, as published.
        structural = _structural_zeros(near, n)

        def zero_mask(block: np.ndarray, r: np.ndarray, c: np.ndarray) -> np.ndarray:
            zeros = block == 0
            if structural is not None:
                zeros &= structural[r][:, c].toarray()
            return zeros

        for s, p, w, c in ((sk, pk, wk, k), (sl, pl, wl, l)):
            if not s.size:
                continue
            jj = bits.joint_block(c, rows[s], c, rows[s]).copy()
            np.fill_diagonal(jj, np.nan)
            prod = np.outer(p[s], p[s])
            with np.errstate(invalid="ignore", divide="ignore"):
                term = np.where(jj > 0, (jj - prod) / jj, 0.0) * np.outer(w, w)
            pair = float(np.nansum(term))
            # the unit with itself has pi_ii(k,k) = pi_i(k) > 0: never a zero
            zero = zero_mask(bits.joint_block(c, rows[s], c, everyone), s, np.arange(n)).sum(1)
            young = float((y[s] ** 2 / p[s] * zero).sum())
            if c == k:
                vk += pair + young
            else:
                vl += pair + young
        cov = 0.0
        if sk.size and sl.size:
            jkl = bits.joint_block(k, rows[sk], l, rows[sl])
            prod = np.outer(pk[sk], pl[sl])
            with np.errstate(invalid="ignore", divide="ignore"):
                cov += float(
                    np.where(jkl > 0, (jkl - prod) / jkl, 0.0).__mul__(np.outer(wk, wl)).sum()
                )
        if sk.size:
            zk = zero_mask(bits.joint_block(k, rows[sk], l, everyone), sk, np.arange(n)).sum(1)
            cov -= float((y[sk] ** 2 / (2 * pk[sk]) * zk).sum())
        if sl.size:
            zl = zero_mask(bits.joint_block(l, rows[sl], k, everyone), sl, np.arange(n)).sum(1)
            cov -= float((y[sl] ** 2 / (2 * pl[sl]) * zl).sum())
        return vk, vl, cov, joint

    if near is None:
        raise InputError(
            f"{n} units are too many for all-pairs joint probabilities; pass the near pairs"
        )
    joint = "linked pairs only; the others taken as independent"
    a, b = near
    pos_k = np.full(n, -1)
    pos_k[sk] = np.arange(sk.size)
    pos_l = np.full(n, -1)
    pos_l[sl] = np.arange(sl.size)
    # The pairs go through in blocks (memory: a few arrays of one block). Counts add up
    # exactly; the pair terms are kept in order and summed once, so every sum is the very
    # same floating-point sum as over all pairs at once.
    terms = np.empty(a.size, dtype=np.float64)
    for s, p, c, pos in ((sk, pk, k, pos_k), (sl, pl, l, pos_l)):
        if not s.size:
            continue
        zero = np.zeros(n, dtype=np.int64)
        filled = 0
        for ba, bb in _blocks(a, b):
            # one popcount pass over the pairs leaving s serves both sums below
            sel = pos[ba] >= 0
            ia, ib = ba[sel], bb[sel]
            jz = bits.joint_pairs(c, rows[ia], c, rows[ib])
            zero += np.bincount(ia[jz == 0], minlength=n)
            both = pos[ib] >= 0
            ia, ib, jj = ia[both], ib[both], jz[both]
            prod = p[ia] * p[ib]
            with np.errstate(invalid="ignore", divide="ignore"):
                term = np.where(jj > 0, (jj - prod) / jj, 0.0) * (y[ia] / p[ia]) * (y[ib] / p[ib])
            terms[filled : filled + term.size] = term
            filled += term.size
        young = float((y[s] ** 2 / p[s] * zero[s]).sum())
        if c == k:
            vk += float(terms[:filled].sum()) + young
        else:
            vl += float(terms[:filled].sum()) + young
    cov = 0.0
    # pi_ij(k, l) once for every near pair with i in k or j in l; the sums take subsets
    zk = np.zeros(n, dtype=np.int64)
    zl = np.zeros(n, dtype=np.int64)
    filled = 0
    for ba, bb in _blocks(a, b):
        in_k, in_l = pos_k[ba] >= 0, pos_l[bb] >= 0
        either = np.flatnonzero(in_k | in_l)
        j_either = bits.joint_pairs(k, rows[ba[either]], l, rows[bb[either]])
        sel = in_k[either] & in_l[either]
        ia, ib = ba[either[sel]], bb[either[sel]]
        jkl = j_either[sel]
        with np.errstate(invalid="ignore", divide="ignore"):
            term = (
                np.where(jkl > 0, (jkl - pk[ia] * pl[ib]) / jkl, 0.0)
                * y[ia]
                / pk[ia]
                * y[ib]
                / pl[ib]
            )
        terms[filled : filled + term.size] = term
        filled += term.size
        # zero joint probabilities of near pairs
        sel = in_k[either]
        zk += np.bincount(ba[either[sel]][j_either[sel] == 0], minlength=n)
        sel = in_l[either]
        zl += np.bincount(bb[either[sel]][j_either[sel] == 0], minlength=n)
    cov += float(terms[:filled].sum())
    del terms
    # plus the unit with itself (pi_ii(k, l) = 0)
    zk = zk[sk] + 1
    cov -= float((y[sk] ** 2 / (2 * pk[sk]) * zk).sum())
    zl = zl[sl] + 1
    cov -= float((y[sl] ** 2 / (2 * pl[sl]) * zl).sum())
    return vk, vl, cov, joint


def _blocks(a: np.ndarray, b: np.ndarray):
    """The pairs (a, b) in consecutive blocks of :data:`NEAR_BLOCK`."""
    for s in range(0, a.size, NEAR_BLOCK):
        yield a[s : s + NEAR_BLOCK], b[s : s + NEAR_BLOCK]


def _near_in_population(
    near: tuple[np.ndarray, np.ndarray], pop: np.ndarray, n_units: int
) -> tuple[np.ndarray, np.ndarray]:
    """The near pairs with both units in ``pop``, as positions into ``pop`` (int32 when it fits).

    Two passes over blocks of pairs (count, then fill), so that the only
    full-length arrays are the result.
    """
    dtype = np.int32 if n_units < 2**31 else np.int64
    where = np.full(n_units, -1, dtype=dtype)
    where[pop] = np.arange(pop.size, dtype=dtype)
    first, second = near
    total = 0
    for ba, bb in _blocks(first, second):
        total += int(np.count_nonzero((where[ba] >= 0) & (where[bb] >= 0)))
    out_a = np.empty(total, dtype=dtype)
    out_b = np.empty(total, dtype=dtype)
    filled = 0
    for ba, bb in _blocks(first, second):
        wa, wb = where[ba], where[bb]
        keep = (wa >= 0) & (wb >= 0)
        m = int(np.count_nonzero(keep))
        out_a[filled : filled + m] = wa[keep]
        out_b[filled : filled + m] = wb[keep]
        filled += m
    return out_a, out_b


def estimate_contrast(
    y: np.ndarray,
    observed: np.ndarray,
    probabilities: np.ndarray,
    k: int,
    l: int,
    bits: ConditionBits,
    *,
    labels: tuple[str, ...],
    estimator: Estimator = "hajek",
    outcome: str = "outcome",
    level: float = 0.95,
    bit_rows: np.ndarray | None = None,
    near: tuple[np.ndarray, np.ndarray] | None = None,
    units: np.ndarray | None = None,
    units_words: str | None = None,
) -> ContrastEstimate:
    """Estimate tau = mu(k) - mu(l) over the units with positive probability of both.

    Horvitz–Thompson: mu(k) = (1/N) sum_i 1{D_i=k} Y_i / pi_i(k); Hajek divides the
    same sum by sum_i 1{D_i=k} / pi_i(k) instead of N (Aronow & Samii 2017). The
    variance is their conservative estimator with joint probabilities from the
    design's own draws; for Hajek it is applied to the residuals from each
    condition's Hajek mean (linearization). Intervals are normal approximations.

    Parameters
    ----------
    y, observed, probabilities
        Outcome, observed condition code and probability matrix (n, C) per unit.
    k, l
        Codes of the exposure and reference conditions.
    bits
        Bit-packed condition indicators of the same draws as ``probabilities``.
    labels
        Condition labels (for the result).
    estimator
        ``"hajek"`` (default; shift-invariant) or ``"horvitz-thompson"``.
    outcome
        Words describing the outcome, repeated in every output.
    level
        Confidence level of the normal interval.
    bit_rows
        Row of each unit in ``bits`` (default: the unit's position).
    near
        Linked pairs of positions (:func:`geoexp.exposure.dependence_pairs`), used when the
        population is too large for all pairs.
    units
        Boolean mask of the units of the estimand (an :class:`Estimand`'s ``units``);
        default every unit with positive probability of both conditions.
    units_words
        The units in words, repeated in the result.

    Returns
    -------
    ContrastEstimate
        The estimate of mu(k) - mu(l) (in the unit of ``y``, e.g. incidents per
        unit), its conservative standard error and normal interval, the two
        condition means, unit counts and positivity exclusions.

    Raises
    ------
    geoexp.errors.InputError
        ``y`` has missing values, or ``estimator`` is not one of the two.

    Notes
    -----
    The result carries Kish's (1965) effective sample size (sum w)^2 / sum w^2 of
    each side's weights 1/pi at the observed assignment: far below the number of
    units observed in a condition, it says that a few units carry the estimate.
    """
    y = np.asarray(y, dtype=np.float64)
    observed = np.asarray(observed)
    if np.isnan(y).any():
        raise InputError("the outcome has missing values; every unit needs one")
    pk, pl = probabilities[:, k], probabilities[:, l]
    eligible = (pk > 0) & (pl > 0)
    # units that can be exposed but never be in the reference condition: positivity losses
    lost = (pk > 0) & (pl <= 0)
    if units is not None:
        units = np.asarray(units, dtype=bool)
        lost = units & ~eligible
        eligible = eligible & units
    pop = np.flatnonzero(eligible)
    rows = pop if bit_rows is None else np.asarray(bit_rows)[pop]
    n = pop.size
    yk, d, qk, ql = y[pop], observed[pop], pk[pop], pl[pop]
    in_k, in_l = d == k, d == l
    tk = (yk[in_k] / qk[in_k]).sum()
    tl = (yk[in_l] / ql[in_l]).sum()
    if estimator == "horvitz-thompson":
        mk, ml = tk / max(n, 1), tl / max(n, 1)
        resid = yk
    elif estimator == "hajek":
        nk = (1 / qk[in_k]).sum()
        nl = (1 / ql[in_l]).sum()
        mk = tk / nk if nk > 0 else np.nan
        ml = tl / nl if nl > 0 else np.nan
        resid = np.where(in_k, yk - mk, np.where(in_l, yk - ml, 0.0))
    else:
        raise InputError(f"estimator must be 'hajek' or 'horvitz-thompson', got {estimator!r}")
    near_pop = None
    if near is not None:
        near_pop = _near_in_population(near, pop, y.size)
    # many small matrix products of joint-probability blocks: one BLAS thread, so a busy
    # machine (or several workers on it) is not oversubscribed
    with compute_threads():
        vk, vl, cov, joint = variance_terms(resid, d, k, l, qk, ql, bits, rows, near_pop)
    var = max((vk + vl - 2 * cov) / max(n, 1) ** 2, 0.0)
    est = mk - ml
    se = float(np.sqrt(var))
    z = norm.ppf(0.5 + level / 2)
    return ContrastEstimate(
        exposure=labels[k],
        reference=labels[l],
        estimator=estimator,
        outcome=outcome,
        estimate=float(est),
        std_error=se,
        ci_low=float(est - z * se),
        ci_high=float(est + z * se),
        mean_exposure=float(mk),
        mean_reference=float(ml),
        n_units=int(n),
        n_exposure=int(in_k.sum()),
        n_reference=int(in_l.sum()),
        n_excluded=int(lost.sum()),
        level=level,
        joint=joint,
        units=units_words or "every unit with positive probability of both conditions",
        ess_exposure=float(kish_ess(1 / qk[in_k])) if in_k.any() else 0.0,
        ess_reference=float(kish_ess(1 / ql[in_l])) if in_l.any() else 0.0,
    )
