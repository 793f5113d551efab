"""Horvitz–Thompson and Hajek estimators of exposure contrasts, with the conservative
variance estimator of Aronow & Samii (2017)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
import pandas as pd
from scipy.stats import norm

from geoexp.errors import InputError
from geoexp.exposure import ConditionBits

Estimator = Literal["hajek", "horvitz-thompson"]

# Above this many entries in a dense block of joint probabilities, the estimator
# uses only the pairs of units within the dependence radius (see variance_terms).
DENSE_LIMIT = 40_000_000


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

    @property
    def contrast(self) -> str:
        """``"<exposure> vs <reference>"``."""
        return f"{self.exposure} vs {self.reference}"

    def __str__(self) -> str:
        pct = int(round(100 * self.level))
        return (
            f"{self.contrast} ({self.estimator}, {self.outcome}): {self.estimate:+.3f} "
            f"(SE {self.std_error:.3f}; {pct}% CI {self.ci_low:+.3f} to {self.ci_high:+.3f}); "
            f"{self.n_exposure} exposed and {self.n_reference} reference units observed of "
            f"{self.n_units} in the estimand, {self.n_excluded} excluded by positivity"
        )

    def to_frame(self) -> pd.DataFrame:
        """One-row frame."""
        return pd.DataFrame([self.__dict__]).assign(contrast=self.contrast).set_index("contrast")


def _zero_counts(block: np.ndarray) -> np.ndarray:
    return (block == 0).sum(axis=1)


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
    into U, both orders) enter the pairwise terms, and pairs farther apart
    are taken as independent (pi_ij = pi_i pi_j). For designs that fix the
    number treated, far pairs are negatively associated, so this drops
    negative terms and the variance stays conservative.
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
        for s, p, w, c in ((sk, pk, wk, k), (sl, pl, wl, l)):
            if not s.size:
                continue
            jj = bits.joint_block(c, rows[s], c, rows[s]).copy()
            np.fill_diagonal(jj, np.nan)
            prod = np.outer(p[s], p[s])
            with np.errstate(invalid="ignore", divide="ignore"):
                term = np.where(jj > 0, (jj - prod) / jj, 0.0) * np.outer(w, w)
            pair = float(np.nansum(term))
            full = bits.joint_block(c, rows[s], c, everyone)
            zero = _zero_counts(
                full
            )  # the unit with itself has pi_ii(k,k) = pi_i(k) > 0: not counted
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
            zk = _zero_counts(bits.joint_block(k, rows[sk], l, everyone))
            cov -= float((y[sk] ** 2 / (2 * pk[sk]) * zk).sum())
        if sl.size:
            zl = _zero_counts(bits.joint_block(l, rows[sl], k, everyone))
            cov -= float((y[sl] ** 2 / (2 * pl[sl]) * zl).sum())
        return vk, vl, cov, joint

    if near is None:
        raise InputError(
            f"{n} units are too many for all-pairs joint probabilities; pass the near pairs"
        )
    joint = "pairs within the dependence radius; farther pairs taken as independent"
    a, b = near
    pos_k = np.full(n, -1)
    pos_k[sk] = np.arange(sk.size)
    pos_l = np.full(n, -1)
    pos_l[sl] = np.arange(sl.size)
    for s, p, c, pos in ((sk, pk, k, pos_k), (sl, pl, l, pos_l)):
        if not s.size:
            continue
        # one popcount pass over the pairs leaving s serves both sums below
        sel = pos[a] >= 0
        ia, ib = a[sel], b[sel]
        jz = bits.joint_pairs(c, rows[ia], c, rows[ib])
        zero = np.bincount(ia[jz == 0], minlength=n)[s]
        both = pos[ib] >= 0
        ia, ib, jj = ia[both], ib[both], jz[both]
        prod = p[ia] * p[ib]
        with np.errstate(invalid="ignore", divide="ignore"):
            term = np.where(jj > 0, (jj - prod) / jj, 0.0) * (y[ia] / p[ia]) * (y[ib] / p[ib])
        young = float((y[s] ** 2 / p[s] * zero).sum())
        if c == k:
            vk += float(term.sum()) + young
        else:
            vl += float(term.sum()) + young
    cov = 0.0
    # pi_ij(k, l) once for every near pair with i in k or j in l; the sums take subsets
    in_k, in_l = pos_k[a] >= 0, pos_l[b] >= 0
    either = np.flatnonzero(in_k | in_l)
    j_either = bits.joint_pairs(k, rows[a[either]], l, rows[b[either]])
    sel = in_k[either] & in_l[either]
    ia, ib = a[either[sel]], b[either[sel]]
    jkl = j_either[sel]
    with np.errstate(invalid="ignore", divide="ignore"):
        cov += float(
            (
                np.where(jkl > 0, (jkl - pk[ia] * pl[ib]) / jkl, 0.0)
                * y[ia]
                / pk[ia]
                * y[ib]
                / pl[ib]
            ).sum()
        )
    # zero joint probabilities: near pairs, plus the unit with itself (pi_ii(k, l) = 0)
    sel = in_k[either]
    z = j_either[sel] == 0
    zk = np.bincount(a[either[sel]][z], minlength=n)[sk] + 1
    cov -= float((y[sk] ** 2 / (2 * pk[sk]) * zk).sum())
    sel = in_l[either]
    z = j_either[sel] == 0
    zl = np.bincount(b[either[sel]][z], minlength=n)[sl] + 1
    cov -= float((y[sl] ** 2 / (2 * pl[sl]) * zl).sum())
    return vk, vl, cov, joint


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
        Pairs of positions within the dependence radius, used when the
        population is too large for all pairs.
    """
    y = np.asarray(y, dtype=np.float64)
    observed = np.asarray(observed)
    if np.isnan(y).any():
        raise InputError("the outcome has missing values; every unit needs one")
    pk, pl = probabilities[:, k], probabilities[:, l]
    eligible = (pk > 0) & (pl > 0)
    # units that can be exposed but never be in the reference condition: positivity losses
    lost = (pk > 0) & (pl <= 0)
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
        where = np.full(y.size, -1)
        where[pop] = np.arange(n)
        a, b = where[near[0]], where[near[1]]
        keep = (a >= 0) & (b >= 0)
        near_pop = (a[keep], b[keep])
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
    )
