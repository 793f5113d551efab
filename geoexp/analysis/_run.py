"""The whole analysis of a trial: estimates, randomization tests, verdicts, displacement."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Literal

import numpy as np
import pandas as pd

from geoexp._rng import Stream
from geoexp.analysis._verdict import Verdict, direct_verdict, spillover_verdict
from geoexp.design import Assignment, CompleteSampler, Design, SaturationSampler
from geoexp.errors import InputError
from geoexp.estimate import (
    ContrastEstimate,
    DisplacementIndex,
    _horvitz,
    estimate_contrast,
    saturation_effects,
    weighted_displacement_quotient,
)
from geoexp.exposure import condition_bits, dependence_pairs
from geoexp.inference import (
    ContrastSpec,
    RandomizationTest,
    default_focal_units,
    fisher_test,
    invert_constant_effect,
    spillover_test,
)
from geoexp.inference._conditional import MIN_FOCAL
from geoexp.outcomes import OutcomeTable, load_outcomes
from geoexp.trialfile import (
    TrialFile,
    design_from_trial,
    outcomes_fingerprint,
    store_results,
    verify_trial,
)

Outcome = Literal["change", "post"]
OUTCOME_WORDS = {
    "change": "change in incidents from the pre-period to the post-period",
    "post": "incidents in the post-period",
}


@dataclass(frozen=True, eq=False)
class Analysis:
    """Everything the analysis of a trial found, with the numbers behind each sentence."""

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
    fisher: tuple[RandomizationTest, ...]
    spillover_tests: tuple[RandomizationTest | None, ...]
    intervals: tuple[tuple[float, float], ...]
    verdicts: tuple[Verdict, ...]
    displacement: tuple[DisplacementIndex, ...]
    per_unit: pd.DataFrame
    notes: tuple[str, ...] = field(default=())
    band_edges: tuple[float, ...] = ()
    saturation: pd.DataFrame | None = None
    distance_unit: str = "m"
    # what the analysis was computed from (see geoexp.trialfile.verify_trial)
    design_fingerprint: str = ""
    outcomes_fingerprint: str = ""

    def to_frame(self) -> pd.DataFrame:
        """One row per contrast: estimates, intervals, p-values and verdicts."""
        rows = []
        for i, e in enumerate(self.effects):
            spill = self.spillover_tests[i] if i < len(self.spillover_tests) else None
            rows.append(
                {
                    "contrast": e.contrast,
                    "outcome": self.outcome_words,
                    "estimator": e.estimator,
                    "estimate": e.estimate,
                    "std_error": e.std_error,
                    "ci_low": e.ci_low,
                    "ci_high": e.ci_high,
                    "ri_ci_low": self.intervals[i][0],
                    "ri_ci_high": self.intervals[i][1],
                    "estimate_ht": self.effects_ht[i].estimate,
                    "std_error_ht": self.effects_ht[i].std_error,
                    "mean_exposed": e.mean_exposure,
                    "mean_reference": e.mean_reference,
                    "p_value": self.fisher[i].p_value,
                    "mc_error": self.fisher[i].mc_error,
                    "p_value_no_spillover": spill.p_value if spill else np.nan,
                    "mc_error_no_spillover": spill.mc_error if spill else np.nan,
                    "n_focal": spill.n_focal if spill else 0,
                    "n_units": e.n_units,
                    "n_exposed": e.n_exposure,
                    "n_reference": e.n_reference,
                    "n_excluded": e.n_excluded,
                    "n_draws": self.fisher[i].n_draws,
                    "percent_of_reference": self.verdicts[i].percent_of_reference,
                    "finding": self.verdicts[i].finding,
                }
            )
        return pd.DataFrame(rows).set_index("contrast")

    def __str__(self) -> str:
        lines = [
            f"Analysis of {self.name} (design {self.spec_hash[:12]})",
            f"Outcome: {self.outcome_words}; {self.estimator} estimator; "
            f"{int(round(100 * self.level))}% intervals.",
            "",
        ]
        lines += [f"- {v.sentence}" for v in self.verdicts]
        lines.append("")
        lines += [f"  {e}" for e in self.effects]
        if self.displacement:
            lines.append("")
            lines += [f"  {d}" for d in self.displacement]
        if self.notes:
            lines.append("")
            lines += [f"Note: {n}" for n in self.notes]
        return "\n".join(lines)


def _near_pairs(design: Design) -> tuple[np.ndarray, np.ndarray]:
    """Pairs of units whose conditions can hinge on a common treatment decision.

    See :func:`geoexp.exposure.dependence_pairs`: units sharing an eligible unit
    within their reach, linked through the design's gap, or (randomized
    saturation) through a shared cluster. Built once per analysis and shared by
    every contrast and estimator, as int32 positions.
    """
    sampler = design.sampler
    while not isinstance(sampler, SaturationSampler) and hasattr(sampler, "base"):
        sampler = sampler.base
    clusters = None
    if isinstance(sampler, SaturationSampler):
        clusters = np.empty(design.units.n, dtype=object)
        clusters[np.asarray(sampler.eligible)] = np.asarray(sampler.clusters)
    return dependence_pairs(
        design.graph,
        design.mapping,
        design.eligible,
        gap=design.spec.assignment.gap_m,
        clusters=clusters,
    )


def analyse(
    trial: TrialFile | str | Path,
    outcomes: OutcomeTable | None = None,
    *,
    outcome: Outcome = "change",
    estimator: Literal["hajek", "horvitz-thompson"] = "hajek",
    n_draws: int = 2000,
    level: float = 0.95,
    intervals: bool = True,
) -> Analysis:
    """Analyse a trial: direct and spillover effects, randomization tests, verdicts.

    The design is rebuilt from the trial file and checked to draw the stored
    assignment again; the exposure probabilities and joint probabilities come
    from the same draws of the design's own sampler as at drawing time.

    - Effects: Hajek (default) and Horvitz–Thompson contrasts of treated and of
      each spillover band against pure controls, with the conservative
      variance of Aronow & Samii (2017), each over the units with positive
      probability of both conditions.
    - Fisher's randomization test of no effect at all for each contrast, and
      the conditional test of no spillover on focal units for each band
      (Athey, Eckles & Imbens 2018), both drawing from the design's sampler.
    - Intervals for a constant additive effect by test inversion.
    - A verdict per band (displacement, diffusion of benefits, or no
      detectable spillover) and the weighted displacement quotient of
      Bowers & Johnson (2003) with treated units as target, each band as
      buffer and pure controls as control area.

    Parameters
    ----------
    trial
        The trial file (with an ``outcomes`` layer unless ``outcomes`` is given).
    outcomes
        Counts per unit for the pre- and post-periods.
    outcome
        ``"change"`` (post minus pre, the default) or ``"post"``.
    estimator
        ``"hajek"`` or ``"horvitz-thompson"`` for the headline estimates.
    n_draws
        Draws of the design for each randomization test.
    level
        Confidence level of the intervals; tests are read at 1 - level.
    intervals
        Whether to invert tests for constant-effect intervals.
    """
    tf = trial if isinstance(trial, TrialFile) else TrialFile.open(trial)
    integrity = verify_trial(tf)  # refuses a trial whose design or outcomes changed
    design, assignment = design_from_trial(tf)
    outcomes_fp = integrity.outcomes_fingerprint if outcomes is None else ""
    outcomes = load_outcomes(tf) if outcomes is None else outcomes
    if not outcomes_fp:
        counted = outcomes.counts.reindex(design.units.ids)
        outcomes_fp = outcomes_fingerprint(counted, outcomes.pre, outcomes.post)
    if outcome not in OUTCOME_WORDS:
        raise InputError(f"outcome must be 'change' or 'post', got {outcome!r}")
    counts = outcomes.counts.reindex(design.units.ids)
    missing = counts.index[counts["post"].isna()]
    if len(missing):
        raise InputError(
            f"the outcome table has no counts for {len(missing)} units of the trial, e.g. "
            f"{list(missing[:10])}"
        )
    post = counts["post"].to_numpy(dtype=float)
    pre = counts["pre"].to_numpy(dtype=float)
    y = post - pre if outcome == "change" else post
    mapping = design.mapping
    pc = mapping.pure_control
    observed = assignment.conditions.astype(np.int64)
    r_prob = design.spec.draws
    bits = condition_bits(
        design.sampler, design.graph, mapping, r_prob, design.stream(Stream.MONTE_CARLO)
    )
    probs = bits.probabilities()
    notes = []
    stored = tf.read("probabilities") if "probabilities" in tf.layers else None
    if stored is not None:
        col = f"p_{mapping.codes[0]}"
        again = pd.Series(probs[:, 0], index=design.units.ids)
        if not np.allclose(stored[col].reindex(design.units.ids), again, atol=1e-12):
            notes.append(
                "the stored exposure probabilities differ from a fresh Monte Carlo of the same "
                "seed; the fresh ones are used"
            )
    # Units far apart can need pairs beyond the dense limit in big trials
    n_big = max(int(((probs[:, k] > 0) & (probs[:, pc] > 0)).sum()) for k in range(pc))
    # the linked pairs tell structural zero joint probabilities from Monte Carlo zeros, and
    # carry the variance alone when the trial is too big for all pairs
    near = _near_pairs(design)
    if n_big * n_big > _horvitz.DENSE_LIMIT:
        notes.append(
            "joint exposure probabilities are computed for the pairs of units whose conditions can "
            "hinge on a common treatment decision; other pairs depend on each other only through "
            "the design's fixed totals and are taken as independent (conservative for the "
            "Horvitz-Thompson estimator; for the Hajek estimator it omits a term of relative size "
            "about one over the units per condition)"
        )
    unit = "incidents"
    words = OUTCOME_WORDS[outcome]
    effects, effects_ht, fishers, spills, cis, verdicts = [], [], [], [], [], []
    alpha = 1 - level
    every = np.ones(design.units.n, dtype=bool)
    # headline contrasts first, then the HT twins
    for k in range(pc):
        spec = ContrastSpec(k, pc, every)
        common = dict(labels=mapping.labels, outcome=words, level=level, near=near)
        e = estimate_contrast(y, observed, probs, k, pc, bits, estimator=estimator, **common)
        other = "horvitz-thompson" if estimator == "hajek" else "hajek"
        e_ht = estimate_contrast(y, observed, probs, k, pc, bits, estimator=other, **common)
        f = fisher_test(design, observed, y, probs, spec, n_draws=n_draws, estimator="hajek")
        s = None
        if k > 0:
            focal = default_focal_units(design, probs, k)
            if focal.size < MIN_FOCAL and isinstance(design.sampler, CompleteSampler):
                focal = _random_focal_units(design, probs, k)
                notes.append(
                    f"{mapping.labels[k]}: too few units are never treated, so the spillover test "
                    f"holds the assignment of {focal.size} focal units chosen at random (from the "
                    "design's seed, before looking at outcomes) and redraws the rest"
                )
            if focal.size >= MIN_FOCAL:
                s = spillover_test(
                    design, observed, assignment.treated, y, probs, k, focal=focal, n_draws=n_draws
                )
            else:
                notes.append(
                    f"{mapping.labels[k]}: only {focal.size} units that are never treated can be "
                    "in this band or pure controls; no exact spillover test"
                )
        ci = (np.nan, np.nan)
        if intervals:
            effects_now = np.zeros(mapping.n_conditions)
            for j, prev in enumerate(effects):
                effects_now[j] = prev.estimate
            ci = invert_constant_effect(
                design,
                observed,
                y,
                probs,
                spec,
                effects_now,
                n_draws=n_draws,
                level=level,
                center=e.estimate,
                scale=max(e.std_error, 1e-6),
            )
        base = _reference_level(post, observed, probs, k, pc)
        verdict = (
            direct_verdict(e, f, alpha, unit, base, ci if intervals else None)
            if k == 0
            else spillover_verdict(e, s, alpha, unit, base, ci if intervals else None)
        )
        effects.append(e)
        effects_ht.append(e_ht)
        fishers.append(f)
        spills.append(s)
        cis.append(ci)
        verdicts.append(verdict)
        if e.n_excluded:
            notes.append(
                f"{e.contrast}: {e.n_excluded:,} unit{'' if e.n_excluded == 1 else 's'} left out "
                "because they can be "
                f"{mapping.labels[k]} but never {mapping.labels[pc]} under this design (positivity)"
            )
    displacement = []
    for k in range(1, pc):
        sums = {c: (pre[observed == c].sum(), post[observed == c].sum()) for c in (0, k, pc)}
        try:
            displacement.append(
                weighted_displacement_quotient(
                    *sums[0], *sums[k], *sums[pc], buffer=mapping.labels[k]
                )
            )
        except InputError as err:
            notes.append(f"no displacement quotient for {mapping.labels[k]}: {err}")
    per_unit = assignment.to_frame()
    per_unit["pre"] = pre
    per_unit["post"] = post
    per_unit["change"] = post - pre
    for k, code in enumerate(mapping.codes):
        per_unit[f"p_{code}"] = probs[:, k]
    kept = getattr(outcomes, "kept_types", ())
    if kept:
        notes.append(
            f"only incidents of type {', '.join(kept)} (column "
            f"{getattr(outcomes, 'type_column', None)!r}) were counted; other types were left out"
        )
    drops = getattr(outcomes, "drops", None)
    if drops is not None and getattr(drops, "n_dropped", 0):
        notes.append(f"incidents not counted: {drops}")
    return Analysis(
        name=design.spec.name,
        spec_hash=design.spec.hash,
        outcome=outcome,
        outcome_words=words,
        estimator=estimator,
        level=level,
        n_draws_probabilities=r_prob,
        n_draws_tests=n_draws,
        effects=tuple(effects),
        effects_ht=tuple(effects_ht),
        fisher=tuple(fishers),
        spillover_tests=tuple(spills),
        intervals=tuple(cis),
        verdicts=tuple(verdicts),
        displacement=tuple(displacement),
        per_unit=per_unit,
        notes=tuple(notes),
        band_edges=mapping.band_edges,
        saturation=_saturation_table(design, assignment, y),
        distance_unit=mapping.unit,
        design_fingerprint=integrity.design_fingerprint,
        outcomes_fingerprint=outcomes_fp,
    )


def _random_focal_units(design: Design, probs: np.ndarray, band: int) -> np.ndarray:
    """Half of the units that can be in the band or pure controls, chosen from the seed alone.

    Athey, Eckles & Imbens (2018) choose focal units at random before the
    outcomes are seen; the conditional test then holds their assignments fixed.
    """
    pc = design.mapping.pure_control
    candidates = np.flatnonzero((probs[:, band] > 0) & (probs[:, pc] > 0))
    rng = np.random.default_rng(design.stream(Stream.FOCAL_UNITS, band))
    return np.sort(rng.choice(candidates, size=candidates.size // 2, replace=False))


def _saturation_table(design: Design, assignment: Assignment, y: np.ndarray) -> pd.DataFrame | None:
    """Direct, spillover and total effects by saturation level, for randomized-saturation designs."""
    sampler = design.sampler
    while not isinstance(sampler, SaturationSampler) and hasattr(sampler, "base"):
        sampler = sampler.base
    if not isinstance(sampler, SaturationSampler) or "cluster_level" not in assignment.extra:
        return None
    cluster_level = np.asarray(assignment.extra["cluster_level"])
    unit_level = cluster_level[sampler.cluster_codes]
    elig = sampler.eligible
    try:
        return saturation_effects(
            y[elig], assignment.treated[elig], unit_level, np.asarray(sampler.saturations)
        )
    except InputError:
        return None


def _reference_level(
    post: np.ndarray, observed: np.ndarray, probs: np.ndarray, k: int, pc: int
) -> float:
    """Hajek mean post-period count of the contrast's pure controls (the base for percentages)."""
    hit = (observed == pc) & (probs[:, pc] > 0) & (probs[:, k] > 0)
    w = 1 / probs[hit, pc]
    return float((post[hit] * w).sum() / w.sum()) if hit.any() else float("nan")


def save_results(
    trial: TrialFile | str | Path,
    analysis: Analysis,
    *,
    wait_s: float | None = None,
    notify: Callable[[str], None] | None = None,
) -> TrialFile:
    """Store the analysis in the trial file: a ``results`` layer and ``results_*`` meta keys.

    The write holds the trial's lock and refuses results computed for another
    design or other outcomes than the trial holds at that moment (a redraw or a
    new count in between). The results record the design and outcomes
    fingerprints they were computed from; earlier results are kept in
    ``superseded_results``.
    """
    path = trial.path if isinstance(trial, TrialFile) else trial
    table = analysis.to_frame().reset_index()
    return store_results(
        path,
        table,
        {
            "results_outcome": analysis.outcome_words,
            "results_estimator": analysis.estimator,
            "results_n_draws": str(analysis.n_draws_tests),
            "results_spec_hash": analysis.spec_hash,
        },
        design_fingerprint=analysis.design_fingerprint,
        outcomes_fingerprint=analysis.outcomes_fingerprint,
        spec_hash=analysis.spec_hash,
        wait_s=wait_s,
        notify=notify,
    )
