"""The units a contrast is about: which units, how many, and why the others are left out.

Every row the analysis prints (and every contrast the power module simulates)
is built on one :class:`Estimand`, so its estimate, interval, test and verdict
are about the same units.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

from geoexp.errors import InputError

# Default positivity floor. Chosen by simulation on the sample city (five design kinds,
# 3,000 assignments each, fixed negative-binomial counts with additive effects planted on
# treated units and band 1; see DEVELOPERS.md, "Estimands, weights and the default
# estimator"): with no floor, units whose probability of pure control is 0.001-0.003 carry
# weights up to 1,000 and the Hajek contrast of post-period counts is biased by 15-20% of
# the planted effect; a floor of 0.05 (weights at most 20) brings the default estimator
# within about 10% on every design kind while keeping 80-100% of the units.
DEFAULT_FLOOR = 0.05

Group = Literal["eligible", "never-eligible", "all"]
_GROUP_WORDS = {
    "eligible": "eligible units (units that may be treated)",
    "never-eligible": "units that can never be treated (not eligible)",
    "all": "all units",
}


def kish_ess(weights: np.ndarray, axis: int | None = None) -> np.ndarray | float:
    """Kish's (1965) effective sample size (sum w)^2 / sum w^2 of a set of weights.

    Equals the number of units when all weights are equal and falls towards 1
    as one weight dominates. NaN when every weight is zero.

    Parameters
    ----------
    weights : numpy.ndarray
        Non-negative weights.
    axis : int, optional
        Axis to sum over; default all entries.

    Returns
    -------
    float or numpy.ndarray
        A float when the sums are over every entry, else an array with
        ``axis`` removed.
    """
    w = np.asarray(weights, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = w.sum(axis=axis) ** 2 / (w**2).sum(axis=axis)
    return float(out) if np.ndim(out) == 0 else out


@dataclass(frozen=True, eq=False)
class Estimand:
    """The units of one contrast tau = mu(exposure) - mu(reference).

    Attributes
    ----------
    exposure, reference
        Condition codes (positions in the exposure mapping) of the two sides.
    exposure_label, reference_label
        Their labels.
    group
        Which units may enter: ``"eligible"``, ``"never-eligible"`` or ``"all"``.
    units
        Boolean mask over every unit of the layer: the units in the estimand.
    floor
        The positivity floor: a unit enters only if its probability of each of
        the two conditions is at least this.
    n_candidates
        Units of the group that can be in both conditions at all (probability > 0).
    n_below_floor
        Of those, units left out because a probability is below the floor.
    n_never_reference
        Units of the group that can be in the exposure condition but never in
        the reference condition (positivity fails outright).
    expected_ess_exposure, expected_ess_reference
        The design's expected Kish effective sample size of each side,
        n^2 / sum_i 1/pi_i (the ratio of the expected sum of weights squared to
        the expected sum of squared weights).
    """

    exposure: int
    reference: int
    exposure_label: str
    reference_label: str
    group: str
    units: np.ndarray
    floor: float
    n_candidates: int
    n_below_floor: int
    n_never_reference: int
    expected_ess_exposure: float
    expected_ess_reference: float

    @property
    def n_units(self) -> int:
        """Units in the estimand."""
        return int(self.units.sum())

    @property
    def contrast(self) -> str:
        """``"<exposure> vs <reference>"``, with the group for rows other than the default."""
        return f"{self.exposure_label} vs {self.reference_label}"

    @property
    def who(self) -> str:
        """The units in words, with their number."""
        return f"{self.n_units:,} {_GROUP_WORDS[self.group]}"

    @property
    def left_out(self) -> str:
        """Why the other units of the group are left out, in words."""
        parts = []
        if self.n_never_reference:
            parts.append(
                f"{self.n_never_reference:,} can be {self.exposure_label} but never "
                f"{self.reference_label} under this design (positivity)"
            )
        if self.n_below_floor:
            parts.append(
                f"{self.n_below_floor:,} have a probability below {self.floor:g} of "
                f"{self.exposure_label} or of {self.reference_label}, so their weights would "
                f"exceed {1 / self.floor:.0f} (positivity floor)"
            )
        return "; ".join(parts) if parts else "none left out"

    def __str__(self) -> str:
        return f"{self.contrast}: {self.who}; left out: {self.left_out}"


def contrast_units(
    probabilities: np.ndarray,
    eligible: np.ndarray,
    k: int,
    l: int,
    *,
    labels: tuple[str, ...],
    group: Group,
    floor: float = DEFAULT_FLOOR,
    within: np.ndarray | None = None,
) -> Estimand:
    """The estimand of a contrast: the group's units with both probabilities at least ``floor``.

    Aronow & Samii (2017) estimate contrasts over the units with positive
    probability of both conditions; units with tiny probabilities make
    inverse-probability weights extreme and the Hajek estimator biased and
    unstable, so a floor on both probabilities trims them from the estimand
    (the estimand changes, which the result says in words; Crump, Hotz, Imbens
    & Mitnik 2009 trim on the propensity score for the same reason).
    ``within`` restricts the group further (e.g. focal units chosen at random).

    Parameters
    ----------
    probabilities : numpy.ndarray
        (n_units, n_conditions) exposure probabilities of the design.
    eligible : numpy.ndarray
        Boolean mask of the units that could be treated.
    k, l : int
        Condition codes of the exposure and the reference condition.
    labels : tuple of str
        Condition labels, indexed by code.
    group : {"eligible", "never-eligible", "all"}
        The units the contrast is about.
    floor : float
        Smallest probability of either condition a unit needs to be in the
        estimand, in [0, 0.5); 0 keeps every unit with positive probabilities.
    within : numpy.ndarray, optional
        Boolean mask restricting the group further.

    Returns
    -------
    Estimand
        The units of the estimand, how many were trimmed by the floor, and
        the expected Kish effective sample size of each side.

    Raises
    ------
    geoexp.errors.InputError
        A floor outside [0, 0.5) or an unknown group.
    """
    if not 0 <= floor < 0.5:
        raise InputError(f"the positivity floor must lie in [0, 0.5), got {floor!r}")
    if group not in _GROUP_WORDS:
        raise InputError(f"group must be one of {list(_GROUP_WORDS)}, got {group!r}")
    p = np.asarray(probabilities, dtype=float)
    eligible = np.asarray(eligible, dtype=bool)
    member = {
        "eligible": eligible,
        "never-eligible": ~eligible,
        "all": np.ones(eligible.size, dtype=bool),
    }[group]
    if within is not None:
        member = member & np.asarray(within, dtype=bool)
    pk, pl = p[:, k], p[:, l]
    possible = member & (pk > 0) & (pl > 0)
    units = possible & (pk >= floor) & (pl >= floor) if floor > 0 else possible
    with np.errstate(divide="ignore"):
        n = int(units.sum())
        ess_k = n**2 / float((1 / pk[units]).sum()) if n else 0.0
        ess_l = n**2 / float((1 / pl[units]).sum()) if n else 0.0
    return Estimand(
        exposure=k,
        reference=l,
        exposure_label=labels[k],
        reference_label=labels[l],
        group=group,
        units=units,
        floor=float(floor),
        n_candidates=int(possible.sum()),
        n_below_floor=int((possible & ~units).sum()),
        n_never_reference=int((member & (pk > 0) & (pl <= 0)).sum()),
        expected_ess_exposure=float(ess_k),
        expected_ess_reference=float(ess_l),
    )
