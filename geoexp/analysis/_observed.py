"""What a trial observed, unit by unit: one bundle that every statistic of the analysis reads."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import numpy as np

from geoexp.design import Assignment, Design
from geoexp.errors import InputError
from geoexp.outcomes import OutcomeTable

Outcome = Literal["change", "post"]
OUTCOME_WORDS: dict[str, str] = {
    "change": "change in incidents from the pre-period to the post-period",
    "post": "incidents in the post-period",
}


@dataclass(frozen=True, eq=False)
class Observed:
    """The observed data of a trial in the design's unit order.

    Attributes
    ----------
    pre, post : numpy.ndarray
        Incidents per unit in the pre- and post-period (float64).
    conditions : numpy.ndarray
        Each unit's observed exposure condition index (int64; the design's
        exposure mapping names them).
    outcome : {"change", "post"}
        What is analysed: post minus pre, or the post-period counts.
    y : numpy.ndarray
        The outcome per unit (float64), derived from the above.
    """

    pre: np.ndarray
    post: np.ndarray
    conditions: np.ndarray
    outcome: Outcome
    y: np.ndarray = field(init=False, repr=False)

    def __post_init__(self) -> None:
        if self.outcome not in OUTCOME_WORDS:
            raise InputError(f"outcome must be 'change' or 'post', got {self.outcome!r}")
        y = self.post - self.pre if self.outcome == "change" else self.post
        object.__setattr__(self, "y", y)

    @property
    def words(self) -> str:
        """The outcome in plain words."""
        return OUTCOME_WORDS[self.outcome]

    @property
    def period(self) -> str:
        """The periods the outcome reads, in words."""
        return "pre-period and post-period" if self.outcome == "change" else "post-period"

    @classmethod
    def of_trial(
        cls, outcomes: OutcomeTable, design: Design, assignment: Assignment, outcome: Outcome
    ) -> Observed:
        """Gather the counts of ``outcomes`` and the assignment, in the design's unit order.

        Parameters
        ----------
        outcomes : OutcomeTable
            Counts per unit id for the pre- and post-periods.
        design : Design
            The trial's design (its units give the order).
        assignment : Assignment
            The drawn assignment (its conditions are the observed ones).
        outcome : {"change", "post"}
            What is analysed.

        Returns
        -------
        Observed

        Raises
        ------
        geoexp.errors.InputError
            An unknown ``outcome``, or units of the trial with no counts.
        """
        if outcome not in OUTCOME_WORDS:
            raise InputError(f"outcome must be 'change' or 'post', got {outcome!r}")
        counts = outcomes.counts.reindex(design.units.ids)
        missing = counts.index[counts["post"].isna()]
        if len(missing):
            raise InputError(
                f"the outcome table has no counts for {len(missing)} units of the trial, e.g. "
                f"{list(missing[:10])}"
            )
        return cls(
            pre=counts["pre"].to_numpy(dtype=float),
            post=counts["post"].to_numpy(dtype=float),
            conditions=assignment.conditions.astype(np.int64),
            outcome=outcome,
        )
