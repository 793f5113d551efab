"""Horvitz–Thompson and Hajek estimators of exposure contrasts, with the conservative
variance estimator of Aronow & Samii (2017)."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal, overload

import numpy as np
import pandas as pd
from scipy.stats import norm

from geoexp._engine import Engine, compute_threads
from geoexp.errors import InputError
from geoexp.estimate._pair_terms import pair_terms
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


@overload
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
    *,
    near_map: np.ndarray | None = None,
    engine: Engine = "auto",
    columns: Literal[False] = False,
) -> tuple[float, float, float, str]: ...


@overload
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
    *,
    near_map: np.ndarray | None = None,
    engine: Engine = "auto",
    columns: Literal[True],
) -> tuple[np.ndarray, np.ndarray, np.ndarray, str]: ...


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
    *,
    near_map: np.ndarray | None = None,
    engine: Engine = "auto",
    columns: bool = False,
) -> tuple[float, float, float, str] | tuple[np.ndarray, np.ndarray, np.ndarray, str]:
    """V[T(k)], V[T(l)] and C[T(k), T(l)] of Aronow & Samii (2017), conservative form.

    All arrays are over the contrast's population U (units with both
    probabilities positive); ``rows`` are their rows in ``bits``. Where a joint
    probability is zero the Young's-inequality terms of Aronow & Samii replace
    the unidentified covariance (pi_ii(k, l) = 0 for k != l always counts).

    When the dense blocks of joint probabilities would exceed
    :data:`DENSE_LIMIT` entries, only the pairs listed in ``near`` (both
    orders; see :func:`geoexp.exposure.dependence_pairs`) enter the pairwise
    terms, and the other pairs are taken as independent (pi_ij = pi_i pi_j).
    Those pairs depend on each other only through the design's fixed totals.
    For the Horvitz–Thompson estimator of counts the dropped terms are negative
    for designs that fix the number treated, so the variance stays
    conservative; for the Hajek estimator (residuals summing to zero) the
    dropped terms add up to a small positive amount, of relative size about
    one over the number of units in a condition.

    With ``columns=True``, ``y`` holds several outcome vectors as columns (n, m)
    (the Hajek residuals and the raw outcome of the Horvitz–Thompson estimator,
    say) and the three terms come back as arrays of m: every joint probability,
    the linked pairs in U and the zero counts are found once for all of them,
    and each column's terms are the very numbers a call with that column alone
    gives.

    ``near`` holds positions into U, or, with ``near_map`` (the position in U
    of every unit, -1 outside U), positions into all units: then the pairs are
    read where they are and no restricted copy is made. ``engine`` chooses the
    kernel of the linked-pairs sums (:mod:`geoexp._engine`; the same numbers
    either way).
    """
    ys = np.asarray(y, dtype=np.float64)
    if not columns:
        ys = ys[:, None]
    if ys.ndim != 2:
        raise InputError(f"y must be one outcome vector or a matrix of columns, got {ys.shape}")
    # one contiguous row per outcome vector, so that every sum below reads its values in the
    # order a single vector would
    ys = np.ascontiguousarray(ys.T)
    m, n = ys.shape
    sk = np.flatnonzero(observed == k)
    sl = np.flatnonzero(observed == l)
    vk = np.array([float(((1 - pk[sk]) * (yo[sk] / pk[sk]) ** 2).sum()) for yo in ys])
    vl = np.array([float(((1 - pl[sl]) * (yo[sl] / pl[sl]) ** 2).sum()) for yo in ys])
    cov = np.zeros(m)
    dense = n * max(sk.size, sl.size, 1) <= DENSE_LIMIT
    if dense:
        joint = "all pairs"
        _dense_terms(ys, sk, sl, k, l, pk, pl, bits, rows, near, near_map, vk, vl, cov)
    elif near is None:
        raise InputError(
            f"{n} units are too many for all-pairs joint probabilities; pass the near pairs"
        )
    else:
        joint = "linked pairs only; the others taken as independent"
        _linked_terms(ys, sk, sl, k, l, pk, pl, bits, rows, near, near_map, engine, vk, vl, cov)
    if columns:
        return vk, vl, cov, joint
    return float(vk[0]), float(vl[0]), float(cov[0]), joint


def _dense_terms(ys, sk, sl, k, l, pk, pl, bits, rows, near, near_map, vk, vl, cov) -> None:
    """The pair and Young's terms from dense blocks of joint probabilities, added in place."""
    n = ys.shape[1]
    everyone = rows
    # With the design's linked pairs known, a zero joint probability of an unlinked pair
    # is Monte Carlo noise, not a structural zero: such pairs get no Young's term (they
    # are taken as independent). Without them, every zero counts, as published.
    if near is not None and near_map is not None:
        near = _near_in_population(near, near_map)
    structural = _structural_zeros(near, n)

    def zero_mask(block: np.ndarray, r: np.ndarray, c: np.ndarray) -> np.ndarray:
        zeros = block == 0
        if structural is not None:
            zeros &= structural[r][:, c].toarray()
        return zeros

    for s, p, c, v in ((sk, pk, k, vk), (sl, pl, l, vl)):
        if not s.size:
            continue
        jj = bits.joint_block(c, rows[s], c, rows[s]).copy()
        np.fill_diagonal(jj, np.nan)
        prod = np.outer(p[s], p[s])
        with np.errstate(invalid="ignore", divide="ignore"):
            coef = np.where(jj > 0, (jj - prod) / jj, 0.0)
        # the unit with itself has pi_ii(k,k) = pi_i(k) > 0: never a zero
        zero = zero_mask(bits.joint_block(c, rows[s], c, everyone), s, np.arange(n)).sum(1)
        for o, yo in enumerate(ys):
            w = yo[s] / p[s]
            pair = float(np.nansum(coef * np.outer(w, w)))
            young = float((yo[s] ** 2 / p[s] * zero).sum())
            v[o] += pair + young
    if sk.size and sl.size:
        jkl = bits.joint_block(k, rows[sk], l, rows[sl])
        prod = np.outer(pk[sk], pl[sl])
        with np.errstate(invalid="ignore", divide="ignore"):
            coef = np.where(jkl > 0, (jkl - prod) / jkl, 0.0)
        for o, yo in enumerate(ys):
            cov[o] += float(coef.__mul__(np.outer(yo[sk] / pk[sk], yo[sl] / pl[sl])).sum())
    if sk.size:
        zk = zero_mask(bits.joint_block(k, rows[sk], l, everyone), sk, np.arange(n)).sum(1)
        for o, yo in enumerate(ys):
            cov[o] -= float((yo[sk] ** 2 / (2 * pk[sk]) * zk).sum())
    if sl.size:
        zl = zero_mask(bits.joint_block(l, rows[sl], k, everyone), sl, np.arange(n)).sum(1)
        for o, yo in enumerate(ys):
            cov[o] -= float((yo[sl] ** 2 / (2 * pl[sl]) * zl).sum())


def _linked_terms(
    ys, sk, sl, k, l, pk, pl, bits, rows, near, near_map, engine, vk, vl, cov
) -> None:
    """The pair and Young's terms over the linked pairs only, added in place."""
    n = ys.shape[1]
    code = np.full(n, 2, dtype=np.int8)
    code[sk] = 0
    code[sl] = 1
    where = np.arange(n) if near_map is None else near_map
    # one pass over the pairs for every outcome vector; the pair terms come back in pair
    # order and are summed once, so every sum is the very same floating-point sum as over
    # the pairs restricted to U first
    terms = pair_terms(
        near[0],
        near[1],
        where,
        code,
        rows,
        bits.bits[k],
        bits.bits[l],
        pk,
        pl,
        ys,
        bits.n_draws,
        engine=engine,
        block=NEAR_BLOCK,
    )
    for o, yo in enumerate(ys):
        if sk.size:
            young = float((yo[sk] ** 2 / pk[sk] * terms.zero_k[sk]).sum())
            vk[o] += float(terms.kk[o].sum()) + young
        if sl.size:
            young = float((yo[sl] ** 2 / pl[sl] * terms.zero_l[sl]).sum())
            vl[o] += float(terms.ll[o].sum()) + young
        cov[o] += float(terms.kl[o].sum())
        # plus the unit with itself (pi_ii(k, l) = 0)
        zk = terms.zero_kl_first[sk] + 1
        cov[o] -= float((yo[sk] ** 2 / (2 * pk[sk]) * zk).sum())
        zl = terms.zero_kl_second[sl] + 1
        cov[o] -= float((yo[sl] ** 2 / (2 * pl[sl]) * zl).sum())


def _near_in_population(
    near: tuple[np.ndarray, np.ndarray], where: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """The near pairs with both units in the population, as positions into it.

    ``where`` gives each unit's position in the population (-1 outside). One
    pass over blocks of pairs, reading the second unit only where the first
    is in; memory is the pairs kept.
    """
    first, second = near
    out_a, out_b = [np.zeros(0, dtype=np.int64)], [np.zeros(0, dtype=np.int64)]
    for s in range(0, first.size, NEAR_BLOCK):
        wa = where[first[s : s + NEAR_BLOCK]]
        at = np.flatnonzero(wa >= 0)
        wb = where[second[s : s + NEAR_BLOCK][at]]
        keep = wb >= 0
        out_a.append(wa[at[keep]])
        out_b.append(wb[keep])
    return np.concatenate(out_a), np.concatenate(out_b)


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
    For both estimators of one contrast, :func:`estimate_contrasts` shares the
    joint probabilities between them.

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
    (only,) = estimate_contrasts(
        y,
        observed,
        probabilities,
        k,
        l,
        bits,
        labels=labels,
        estimators=(estimator,),
        outcome=outcome,
        level=level,
        bit_rows=bit_rows,
        near=near,
        units=units,
        units_words=units_words,
    )
    return only


def estimate_contrasts(
    y: np.ndarray,
    observed: np.ndarray,
    probabilities: np.ndarray,
    k: int,
    l: int,
    bits: ConditionBits,
    *,
    labels: tuple[str, ...],
    estimators: Sequence[Estimator] = ("hajek", "horvitz-thompson"),
    outcome: str = "outcome",
    level: float = 0.95,
    bit_rows: np.ndarray | None = None,
    near: tuple[np.ndarray, np.ndarray] | None = None,
    units: np.ndarray | None = None,
    units_words: str | None = None,
    engine: Engine = "auto",
) -> tuple[ContrastEstimate, ...]:
    """Estimate tau = mu(k) - mu(l) with several estimators that share their joint probabilities.

    The same estimates as one call of :func:`estimate_contrast` per estimator
    (Aronow & Samii 2017; to the last digit), computed together: the
    estimators of one contrast share its population, its linked pairs and
    every joint probability, and differ only in the outcome vector of the
    variance (the Hajek residuals, or the raw outcome for Horvitz–Thompson),
    so the pairs are visited once for all of them.

    Parameters
    ----------
    y, observed, probabilities, k, l, bits, labels
        As for :func:`estimate_contrast`.
    estimators
        The estimators, each ``"hajek"`` or ``"horvitz-thompson"``.
    outcome, level, bit_rows, near, units, units_words
        As for :func:`estimate_contrast`.
    engine
        "auto", "numba" or "numpy": the kernel of the linked-pairs sums
        (:mod:`geoexp._engine`); the same numbers either way.

    Returns
    -------
    tuple of ContrastEstimate
        One estimate per estimator, in the order asked.

    Raises
    ------
    geoexp.errors.InputError
        ``y`` has missing values, or an estimator is not one of the two.
    """
    y = np.asarray(y, dtype=np.float64)
    observed = np.asarray(observed)
    if np.isnan(y).any():
        raise InputError("the outcome has missing values; every unit needs one")
    for estimator in estimators:
        if estimator not in ("hajek", "horvitz-thompson"):
            raise InputError(f"estimator must be 'hajek' or 'horvitz-thompson', got {estimator!r}")
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
    means, resids = [], []
    for estimator in estimators:
        if estimator == "horvitz-thompson":
            mk, ml = tk / max(n, 1), tl / max(n, 1)
            resid = yk
        else:
            nk = (1 / qk[in_k]).sum()
            nl = (1 / ql[in_l]).sum()
            mk = tk / nk if nk > 0 else np.nan
            ml = tl / nl if nl > 0 else np.nan
            resid = np.where(in_k, yk - mk, np.where(in_l, yk - ml, 0.0))
        means.append((mk, ml))
        resids.append(resid)
    # the linked pairs are read in place, through each unit's position in the population
    near_map = None
    if near is not None:
        near_map = np.full(y.size, -1, dtype=np.int64)
        near_map[pop] = np.arange(n)
    # many small matrix products of joint-probability blocks: one BLAS thread, so a busy
    # machine (or several workers on it) is not oversubscribed
    with compute_threads():
        vk, vl, cov, joint = variance_terms(
            np.column_stack(resids) if resids else np.zeros((n, 0)),
            d,
            k,
            l,
            qk,
            ql,
            bits,
            rows,
            near,
            near_map=near_map,
            engine=engine,
            columns=True,
        )
    z = norm.ppf(0.5 + level / 2)
    out = []
    for o, (estimator, (mk, ml)) in enumerate(zip(estimators, means, strict=True)):
        var = max((float(vk[o]) + float(vl[o]) - 2 * float(cov[o])) / max(n, 1) ** 2, 0.0)
        est = mk - ml
        se = float(np.sqrt(var))
        out.append(
            ContrastEstimate(
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
        )
    return tuple(out)
