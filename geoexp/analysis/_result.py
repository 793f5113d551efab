"""What an analysis returns: one result per contrast row, and the whole analysis."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from geoexp.analysis._verdict import Verdict
from geoexp.estimate import DEFAULT_FLOOR, ContrastEstimate, DisplacementIndex, Estimand
from geoexp.inference import InvertedTest, RandomizationTest


@dataclass(frozen=True, eq=False)
class ContrastResult:
    """Everything about one contrast row, all computed over the same units.

    Attributes
    ----------
    exposure_code, reference_code
        Condition codes (``"treated"``, ``"spillover_1"``, ``"pure_control"``): outputs
        match rows by these, never by label text.
    estimand
        The units (which, how many, why others are left out) of every number below.
    period, outcome
        The period and the outcome of the additive estimate, in words.
    effect, effect_ht
        The headline (Hajek) and Horvitz–Thompson estimates over the units, with
        Kish effective sample sizes and the Aronow & Samii (2017) standard error.
    additive
        The randomization test of no additive effect and its inversion: the
        interval and the p-value the verdict uses.
    rate_ratio
        Post-period rate ratio with its interval and test (randomization
        inversion of a multiplicative effect); None when not computed.
    exact
        Spillover rows on focal units: the exact conditional test of no
        spillover (Athey, Eckles & Imbens 2018) on the same units; else None.
    show_approximation
        Whether the normal-approximation interval is shown (calibration rule in
        :mod:`geoexp.analysis._verdict`).
    sensitivity
        The estimate under the other outcome definitions, by name.
    verdict
        The one verdict of the row.
    """

    exposure_code: str
    reference_code: str
    estimand: Estimand
    period: str
    outcome: str
    effect: ContrastEstimate
    effect_ht: ContrastEstimate
    additive: InvertedTest
    rate_ratio: InvertedTest | None
    exact: RandomizationTest | None
    show_approximation: bool
    sensitivity: dict
    verdict: Verdict

    @property
    def label(self) -> str:
        """The row's label, naming its units' group."""
        return f"{self.estimand.contrast} ({self.estimand.group} units)"

    def to_frame(self) -> pd.DataFrame:
        """One-row frame."""
        rr = self.rate_ratio
        row = {
            "row": self.label,
            "exposure": self.exposure_code,
            "reference": self.reference_code,
            "units": self.estimand.who,
            "left_out": self.estimand.left_out,
            "n_units": self.estimand.n_units,
            "period": self.period,
            "outcome": self.outcome,
            "estimate": self.effect.estimate,
            "ci_low": self.additive.ci_low,
            "ci_high": self.additive.ci_high,
            "p_value": self.additive.test.p_value,
            "approx_ci_low": self.effect.ci_low if self.show_approximation else np.nan,
            "approx_ci_high": self.effect.ci_high if self.show_approximation else np.nan,
            "rate_ratio": rr.estimate if rr else np.nan,
            "rate_ratio_low": rr.ci_low if rr else np.nan,
            "rate_ratio_high": rr.ci_high if rr else np.nan,
            "p_value_rate_ratio": rr.test.p_value if rr else np.nan,
            "p_value_no_spillover": self.exact.p_value if self.exact else np.nan,
            "ess_exposure": self.effect.ess_exposure,
            "ess_reference": self.effect.ess_reference,
            **{f"sensitivity: {k}": v for k, v in self.sensitivity.items()},
            "finding": self.verdict.finding,
        }
        return pd.DataFrame([row]).set_index("row")


@dataclass(frozen=True, eq=False)
class Analysis:
    """Everything the analysis of a trial found, with the numbers behind each sentence.

    ``rows`` holds one :class:`ContrastResult` per contrast row (the treated
    row, one row per spillover band on the units that can never be treated,
    and, where the design supports one, a row per band on the eligible units
    next to treated ones). The tuples ``effects`` ... ``verdicts`` follow the
    first rows (treated, then each band on never-eligible units) in condition
    order. ``fisher`` holds the test of "no effect at all" for the treated row
    only (None on spillover rows: rejecting it is not evidence of spillover).
    """

    name: str
    spec_hash: str
    outcome: str
    outcome_words: str
    estimator: str
    level: float
    n_draws_probabilities: int
    n_draws_tests: int
    effects: tuple[ContrastEstimate, ...]
    effects_ht: tuple[ContrastEstimate, ...]
    fisher: tuple[RandomizationTest | None, ...]
    spillover_tests: tuple[RandomizationTest | None, ...]
    intervals: tuple[tuple[float, float], ...]
    verdicts: tuple[Verdict, ...]
    displacement: tuple[DisplacementIndex, ...]
    per_unit: pd.DataFrame
    notes: tuple[str, ...] = field(default=())
    band_edges: tuple[float, ...] = ()
    saturation: pd.DataFrame | None = None
    distance_unit: str = "m"
    rows: tuple[ContrastResult, ...] = ()
    floor: float = DEFAULT_FLOOR
    total_net_effect: float = float("nan")
    control_trend: float = float("nan")
    # what the analysis was computed from (see geoexp.trialfile.verify_trial)
    design_fingerprint: str = ""
    outcomes_fingerprint: str = ""

    @property
    def codes(self) -> tuple[str, ...]:
        """The exposed condition's code of each of ``effects`` (from its :class:`ContrastResult`)."""
        return tuple(r.exposure_code for r in self.rows[: len(self.effects)])

    def to_frame(self) -> pd.DataFrame:
        """One row per main contrast: estimates, intervals, p-values and verdicts."""
        out = []
        for i, e in enumerate(self.effects):
            spill = self.spillover_tests[i] if i < len(self.spillover_tests) else None
            fisher = self.fisher[i] if i < len(self.fisher) else None
            row = self.rows[i] if i < len(self.rows) else None
            out.append(
                {
                    "contrast": e.contrast,
                    "units": e.units,
                    "outcome": self.outcome_words,
                    "estimator": e.estimator,
                    "estimate": e.estimate,
                    "std_error": e.std_error,
                    "ci_low": self.intervals[i][0],
                    "ci_high": self.intervals[i][1],
                    "approx_ci_low": e.ci_low if row and row.show_approximation else np.nan,
                    "approx_ci_high": e.ci_high if row and row.show_approximation else np.nan,
                    "estimate_ht": self.effects_ht[i].estimate,
                    "std_error_ht": self.effects_ht[i].std_error,
                    "mean_exposed": e.mean_exposure,
                    "mean_reference": e.mean_reference,
                    "p_value": self.verdicts[i].p_value,
                    "mc_error": row.additive.test.mc_error if row else np.nan,
                    "p_value_no_effect_at_all": fisher.p_value if fisher else np.nan,
                    "p_value_no_spillover": spill.p_value if spill else np.nan,
                    "mc_error_no_spillover": spill.mc_error if spill else np.nan,
                    "n_focal": spill.n_focal if spill else 0,
                    "rate_ratio": row.rate_ratio.estimate if row and row.rate_ratio else np.nan,
                    "rate_ratio_low": row.rate_ratio.ci_low if row and row.rate_ratio else np.nan,
                    "rate_ratio_high": (
                        row.rate_ratio.ci_high if row and row.rate_ratio else np.nan
                    ),
                    "n_units": e.n_units,
                    "n_exposed": e.n_exposure,
                    "n_reference": e.n_reference,
                    "n_excluded": e.n_excluded,
                    "ess_exposed": e.ess_exposure,
                    "ess_reference": e.ess_reference,
                    "n_draws": self.n_draws_tests,
                    "percent_of_reference": self.verdicts[i].percent_of_reference,
                    "finding": self.verdicts[i].finding,
                }
            )
        return pd.DataFrame(out).set_index("contrast")

    def rows_frame(self) -> pd.DataFrame:
        """Every contrast row (including rows for eligible neighbours), one line each."""
        if not self.rows:
            return pd.DataFrame()
        return pd.concat([r.to_frame() for r in self.rows])

    def __str__(self) -> str:
        lines = [
            f"Analysis of {self.name} (design {self.spec_hash[:12]})",
            f"Outcome: {self.outcome_words}; {self.estimator} estimator; "
            f"{int(round(100 * self.level))}% intervals; positivity floor {self.floor:g}.",
            "",
        ]
        lines += [f"- {r.verdict.sentence}" for r in self.rows] or [
            f"- {v.sentence}" for v in self.verdicts
        ]
        if self.fisher and self.fisher[0] is not None:
            lines.append(f"- Whole trial: {self.fisher[0]}")
        lines.append("")
        lines += [f"  {r.estimand}" for r in self.rows]
        lines += [f"  {e}" for e in self.effects]
        if self.displacement:
            lines.append("")
            lines += [f"  {d}" for d in self.displacement]
            clear = all(d.direct_effect_clear and d.buffer_effect_clear for d in self.displacement)
            if np.isfinite(self.total_net_effect) and clear:
                lines.append(
                    f"  Total net effect (descriptive, no interval; treated area counted once, "
                    f"every band added): {self.total_net_effect:+.1f} incidents prevented; "
                    f"control trend (pure controls after / before) {self.control_trend:.3f}"
                )
            elif np.isfinite(self.total_net_effect):
                lines.append(
                    "  Total net effect not given: the treated change or a band's own test is "
                    "not clear, so a sum of incidents 'prevented' would read chance as an effect."
                )
        if self.notes:
            lines.append("")
            lines += [f"Note: {n}" for n in self.notes]
        return "\n".join(lines)
