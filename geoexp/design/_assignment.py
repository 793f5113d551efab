"""One drawn assignment: who is treated, and every unit's exposure condition."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from geoexp.exposure import ExposureMapping


@dataclass(frozen=True, eq=False)
class Assignment:
    """A drawn assignment of treatment, with the exposure condition it implies for every unit.

    Attributes
    ----------
    ids
        Unit ids (the whole layer, in the graph's order).
    treated
        Boolean array: treated or not.
    conditions
        int8 condition codes from ``mapping`` (0 treated, k spillover band k, last pure control).
    eligible
        Boolean array: could the unit be treated under the design.
    mapping
        The exposure mapping.
    spec_hash, seed
        The design spec's content hash and the seed it was drawn with.
    drawn_at
        UTC time of the draw (ISO 8601).
    extra
        Design-specific records per draw (e.g. each cluster's saturation level).
    """

    ids: pd.Index
    treated: np.ndarray
    conditions: np.ndarray
    eligible: np.ndarray
    mapping: ExposureMapping
    spec_hash: str
    seed: int
    drawn_at: str
    extra: dict = field(default_factory=dict)

    @property
    def n_treated(self) -> int:
        """Number of treated units."""
        return int(self.treated.sum())

    def condition_counts(self) -> pd.Series:
        """Number of units in each exposure condition (labels with their distances)."""
        counts = np.bincount(self.conditions, minlength=self.mapping.n_conditions)
        return pd.Series(counts, index=list(self.mapping.labels), name="units")

    def to_frame(self) -> pd.DataFrame:
        """One row per unit: eligible, treated, condition (code name) and condition_label."""
        codes = np.asarray(self.mapping.codes, dtype=object)
        labels = np.asarray(self.mapping.labels, dtype=object)
        return pd.DataFrame(
            {
                "eligible": self.eligible,
                "treated": self.treated,
                "condition": codes[self.conditions].astype(str),
                "condition_label": labels[self.conditions].astype(str),
            },
            index=self.ids,
        )

    def __str__(self) -> str:
        counts = self.condition_counts()
        parts = ", ".join(f"{label}: {n:,}" for label, n in counts.items())
        return (
            f"Assignment of design {self.spec_hash[:12]} (seed {self.seed}): "
            f"{self.n_treated:,} treated of {int(self.eligible.sum()):,} eligible; {parts}"
        )
