"""The whole analysis of a trial: estimates, randomization tests, verdicts, displacement."""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import replace
from typing import Literal

import numpy as np
import pandas as pd

from geoexp._rng import Stream
from geoexp.analysis._observed import Observed, Outcome
from geoexp.analysis._result import Analysis, ContrastResult
from geoexp.analysis._verdict import approximation_supported, row_verdict
from geoexp.design import Assignment, CompleteSampler, Design, SaturationSampler
from geoexp.errors import InputError
from geoexp.estimate import (
    DENSE_LIMIT,
    ContrastEstimate,
    DisplacementIndex,
    Estimand,
    adjusted_contrast,
    contrast_units,
    estimate_contrasts,
    saturation_effects,
    weighted_displacement_quotient,
)
from geoexp.exposure import condition_bits, dependence_pairs
from geoexp.inference import (
    MIN_FOCAL,
    ContrastSpec,
    InvertedTest,
    Pending,
    SharedDraws,
    spillover_test,
)
from geoexp.outcomes import OutcomeTable, load_outcomes
from geoexp.trialfile import (
    TrialFile,
    design_from_trial,
    outcomes_fingerprint,
    shared_reads,
    store_results,
    verify_trial,
)

Estimator = Literal["hajek", "horvitz-thompson"]
# A row for the eligible units next to treated units is added when both of its sides have at
# least this expected Kish effective sample size (see geoexp.estimate.Estimand).
MIN_ROW_ESS = 10


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
    trial: TrialFile | str | os.PathLike[str],
    outcomes: OutcomeTable | None = None,
    *,
    outcome: Outcome = "change",
    estimator: Estimator = "hajek",
    n_draws: int = 2000,
    level: float = 0.95,
    intervals: bool = True,
    floor: float | None = None,
) -> Analysis:
    """Analyse a trial: one row per contrast, each with its own units, tests and verdict.

    The design is rebuilt from the trial file and checked to draw the stored
    assignment again; the exposure probabilities and joint probabilities come
    from the same draws of the design's own sampler as at drawing time.

    Rows and their units (:func:`geoexp.estimate.contrast_units`):

    - treated vs pure control over the eligible units whose probabilities of
      both conditions reach the positivity floor;
    - each spillover band vs pure control over the units that can never be
      treated (the focal units of the exact conditional test), floor applied;
    - each band vs pure control over the eligible units, where the design gives
      both sides an expected effective sample size of at least
      :data:`MIN_ROW_ESS`.

    On each row, over its units: the Hajek contrast of the outcome (default:
    the change from the pre-period, a difference-in-differences Hajek
    estimator, chosen by calibration: see DEVELOPERS.md) with the conservative
    variance of Aronow & Samii (2017); the randomization test of no additive
    effect and the interval that inverts it (Rosenbaum 2002), both with the
    equal-tailed two-sided rule; the post-period rate ratio with its own
    inverted interval; on band rows the exact conditional test of no spillover
    (Athey, Eckles & Imbens 2018); a sensitivity line with the other outcome
    definitions (post-period only; regression-adjusted on the pre-period, Lin
    2013); one verdict (:func:`geoexp.analysis._verdict.row_verdict`). Fisher's
    test of no effect at all is reported once for the whole trial. The
    weighted displacement quotient of Bowers & Johnson (2003) is descriptive,
    read only when the treated row shows a clear reduction.

    Every test that draws the design itself (the additive and rate-ratio tests
    and their intervals, Fisher's test, the spillover tests on units that are
    never treated, the quotient's spread) reads one shared set of ``n_draws``
    draws (:class:`geoexp.inference.SharedDraws`): each stays exact, and one
    pass of the exposure engine serves them all.

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
        Whether to invert the tests into intervals (the tests are run either way).
    floor
        Positivity floor (default: the spec's ``[exposure] positivity_floor`` if it
        has one, else :data:`geoexp.estimate.DEFAULT_FLOOR`).

    Returns
    -------
    Analysis
        One row per contrast (estimate in incidents per unit, standard error,
        intervals, p-values, verdict), the trial-wide Fisher test and the
        fingerprints of the design and outcomes analysed.
    """
    tf = trial if isinstance(trial, TrialFile) else TrialFile.open(trial)
    # the check and the rebuild read the same layers: from disk once
    with shared_reads():
        integrity = verify_trial(tf)  # refuses a trial whose design or outcomes changed
        design, assignment = design_from_trial(tf)
    outcomes_fp = integrity.outcomes_fingerprint if outcomes is None else ""
    outcomes = load_outcomes(tf) if outcomes is None else outcomes
    if not outcomes_fp:
        counted = outcomes.counts.reindex(design.units.ids)
        outcomes_fp = outcomes_fingerprint(counted, outcomes.pre, outcomes.post)
    obs = Observed.of_trial(outcomes, design, assignment, outcome)
    pre, post, y, observed = obs.pre, obs.post, obs.y, obs.conditions
    mapping = design.mapping
    pc = mapping.pure_control
    r_prob = design.spec.draws
    # the linked pairs tell structural zero joint probabilities from Monte Carlo zeros, and
    # carry the variance alone when the trial is too big for all pairs; found before the
    # joint-probability bits are held, so that the two peaks of memory do not add up
    near = _near_pairs(design)
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
    if n_big * n_big > DENSE_LIMIT:
        notes.append(
            "joint exposure probabilities are computed for the pairs of units whose conditions can "
            "hinge on a common treatment decision; other pairs depend on each other only through "
            "the design's fixed totals and are taken as independent (conservative for the "
            "Horvitz-Thompson estimator; for the Hajek estimator it omits a term of relative size "
            "about one over the units per condition)"
        )
    floor = _floor(design, floor)
    unit = "incidents"
    words = obs.words
    alpha = 1 - level
    labels = mapping.labels
    plan = _plan_rows(design, probs, floor, notes)

    other: Estimator = "horvitz-thompson" if estimator == "hajek" else "hajek"
    # both estimators of a row share its linked pairs and joint probabilities
    effects: list[tuple[ContrastEstimate, ...]] = [
        estimate_contrasts(
            y,
            observed,
            probs,
            est.exposure,
            pc,
            bits,
            estimators=(estimator, other),
            labels=labels,
            outcome=words,
            level=level,
            near=near,
            units=est.units,
            units_words=est.who,
        )
        for _, est, _ in plan
    ]
    # the linked pairs and the joint-probability bits serve the variances only: let them go
    # before the tests' pass over the draws, so that the two peaks of memory do not add up
    del near, bits
    # the other conditions' effects in each test's model: the main rows' estimates
    plug = np.zeros(mapping.n_conditions)
    ratios = np.ones(mapping.n_conditions)
    for (k, est, _), (e, _) in zip(plan, effects, strict=True):
        if est.group != "eligible" or k == 0:
            plug[k] = e.estimate if np.isfinite(e.estimate) else 0.0
            ratio = _hajek_rate_ratio(obs, probs, k, pc, est.units)
            ratios[k] = ratio if np.isfinite(ratio) and ratio > 0 else 1.0
    # Every test that draws the whole design reads the same draws: the additive and rate-ratio
    # tests of every row, Fisher's test and the spread of the displacement quotient. One pass
    # of the exposure engine serves them all (see geoexp.inference.SharedDraws).
    shared = SharedDraws(design, n_draws, design.stream(Stream.ROW_TESTS))
    adds: dict[int, Pending[list[InvertedTest]]] = {}
    rates: dict[int, Pending[list[InvertedTest]]] = {}
    conditions = sorted({k for k, _, _ in plan})
    for k in conditions:
        at = [i for i, (kk, _, _) in enumerate(plan) if kk == k]
        specs = [ContrastSpec(k, pc, plan[i][1].units) for i in at]
        wheres = [f"{labels[k]} units ({plan[i][1].who})" for i in at]
        fits = [effects[i][0] for i in at]
        adds[k] = shared.additive(
            observed,
            y,
            probs,
            specs,
            plug,
            level=level,
            centers=[e.estimate if np.isfinite(e.estimate) else 0.0 for e in fits],
            scales=[max(e.std_error, 1e-6) if np.isfinite(e.std_error) else 1.0 for e in fits],
            nulls=[f"no additive effect on {w}, other effects at their estimates" for w in wheres],
            interval=intervals,
        )
        rates[k] = shared.rate_ratio(
            observed,
            post,
            probs,
            specs,
            ratios,
            level=level,
            nulls=[f"rate ratio 1 on {w}, other ratios at their estimates" for w in wheres],
            interval=intervals,
            baselines=[pre if (pre[plan[i][1].units] > 0).any() else None for i in at],
        )
    direct_spec = ContrastSpec(0, pc, plan[0][1].units)
    fisher = shared.fisher(
        observed,
        y,
        probs,
        direct_spec,
        null=f"no effect at all ({labels[0]} vs {labels[pc]} statistic)",
    )
    # the exact test of no spillover on focal units that are never treated draws the design
    # itself (Athey, Eckles & Imbens 2018), so it shares the draws too
    spills = {
        i: shared.spillover(observed, y, probs, k, focal)
        for i, (k, _, focal) in enumerate(plan)
        if focal is not None and not design.eligible[focal].any()
    }
    wdq_sums = shared.sums(_wdq_columns(obs, ratios)) if intervals and pc > 1 else None
    shared.run()
    add_of: dict[int, InvertedTest] = {}
    rate_of: dict[int, InvertedTest] = {}
    for k in conditions:
        at = [i for i, (kk, _, _) in enumerate(plan) if kk == k]
        add_of.update(zip(at, adds[k].result(), strict=True))
        rate_of.update(zip(at, rates[k].result(), strict=True))
    rows: list[ContrastResult] = []
    fisher0 = fisher.result()
    for i, ((k, est, focal), (e, e_other)) in enumerate(zip(plan, effects, strict=True)):
        add, rate = add_of[i], rate_of[i]
        exact = spills[i].result() if i in spills else None
        if focal is not None and exact is None:
            # eligible focal units: the design conditional on their assignment
            exact = spillover_test(
                design, observed, assignment.treated, y, probs, k, focal=focal, n_draws=n_draws
            )
        sensitivity = _sensitivity(obs, probs, k, pc, est.units)
        show = approximation_supported(e, k == 0) and estimator == "hajek"
        verdict = row_verdict(
            est,
            e,
            add,
            alpha=alpha,
            unit=unit,
            direct=k == 0,
            rate=rate,
            exact=exact,
            show_approximation=show,
            sensitivity="; ".join(f"{name} {v:+.2f}" for name, v in sensitivity.items()),
        )
        rows.append(
            ContrastResult(
                exposure_code=mapping.codes[k],
                reference_code=mapping.codes[pc],
                estimand=est,
                period=obs.period,
                outcome=words,
                effect=e,
                effect_ht=e_other,
                additive=add,
                rate_ratio=rate,
                exact=exact,
                show_approximation=show,
                sensitivity=sensitivity,
                verdict=verdict,
            )
        )
        if est.n_never_reference or est.n_below_floor:
            notes.append(f"{est.contrast}, {est.group} units: left out {est.left_out}")
    # the main rows: the direct effect and one row per band that has units (plan order)
    main = rows[: 1 + sum(1 for k, est, _ in plan if k > 0 and est.group != "eligible")]
    band_rows = {mapping.codes.index(r.exposure_code): r for r in main[1:]}
    displacement = []
    clear = main[0].verdict.finding == "reduction"
    sums = {c: (pre[observed == c].sum(), post[observed == c].sum()) for c in range(pc + 1)}
    for k in range(1, pc):
        band_row = band_rows.get(k)
        try:
            displacement.append(
                weighted_displacement_quotient(
                    *sums[0],
                    *sums[k],
                    *sums[pc],
                    buffer=mapping.labels[k],
                    direct_effect_clear=clear,
                    buffer_effect_clear=band_row is not None
                    and band_row.verdict.finding in ("displacement", "diffusion of benefits"),
                )
            )
        except InputError as err:
            notes.append(f"no displacement quotient for {mapping.labels[k]}: {err}")
    if displacement and wdq_sums is not None:
        displacement = _wdq_intervals(design, ratios, displacement, wdq_sums.result(), level=level)
    tne, trend = float("nan"), float("nan")
    if displacement:
        d0 = displacement[0]
        trend = d0.control_after / d0.control_before
        # the treated area once, each band's buffer part added
        tne = (d0.target_before * trend - d0.target_after) + sum(
            d.buffer_before * trend - d.buffer_after for d in displacement
        )
    per_unit = assignment.to_frame()
    per_unit["pre"] = pre
    per_unit["post"] = post
    per_unit["change"] = post - pre
    for k, code in enumerate(mapping.codes):
        per_unit[f"p_{code}"] = probs[:, k]
    for r in main:
        per_unit[f"in_{r.exposure_code}"] = r.estimand.units
    if outcomes.kept_types:
        notes.append(
            f"only incidents of type {', '.join(outcomes.kept_types)} (column "
            f"{outcomes.type_column!r}) were counted; other types were left out"
        )
    if outcomes.drops is not None and outcomes.drops.n_dropped:
        notes.append(f"incidents not counted: {outcomes.drops}")
    return Analysis(
        name=design.spec.name,
        spec_hash=design.spec.hash,
        outcome=outcome,
        outcome_words=words,
        estimator=estimator,
        level=level,
        n_draws_probabilities=r_prob,
        n_draws_tests=n_draws,
        effects=tuple(r.effect for r in main),
        effects_ht=tuple(r.effect_ht for r in main),
        fisher=tuple([fisher0] + [None] * (len(main) - 1)),
        spillover_tests=tuple(r.exact for r in main),
        intervals=tuple((r.additive.ci_low, r.additive.ci_high) for r in main),
        verdicts=tuple(r.verdict for r in main),
        displacement=tuple(displacement),
        per_unit=per_unit,
        notes=tuple(notes),
        band_edges=mapping.band_edges,
        saturation=_saturation_table(design, assignment, y),
        distance_unit=mapping.unit,
        rows=tuple(rows),
        floor=floor,
        total_net_effect=tne,
        control_trend=trend,
        design_fingerprint=integrity.design_fingerprint,
        outcomes_fingerprint=outcomes_fp,
    )


def _wdq_columns(obs: Observed, ratios: np.ndarray) -> np.ndarray:
    """The columns whose per-draw sums give the displacement quotient of every draw.

    The pre-period counts, and the post-period counts imputed under the fitted
    rate ratios (the rows' estimates) for the pure-control condition:
    Y_i(pure control) = post_i / rho_{d_i}.
    """
    return np.column_stack([obs.pre, obs.post / ratios[obs.conditions]]).astype(float)


def _wdq_intervals(
    design: Design,
    ratios: np.ndarray,
    indices: list[DisplacementIndex],
    sums: np.ndarray,
    *,
    level: float,
) -> list[DisplacementIndex]:
    """Each quotient with the spread it has over the design's own assignments.

    ``sums`` are the per-draw sums by condition of :func:`_wdq_columns`. For
    every draw of the design the counts of the target, each buffer and the
    control area are those the draw would have produced under the fitted rate
    ratios, and the quotient of Bowers & Johnson (2003) is recomputed; the
    interval holds the central ``level`` share of those quotients. It shows how
    much the quotient moves with which units happen to be treated, which the
    published quotient does not report; it is a randomization interval under
    the fitted model, not a test.
    """
    mapping = design.mapping
    pc = mapping.pure_control
    before = sums[:, :, 0]
    after = sums[:, :, 1] * ratios[None, :]
    with np.errstate(invalid="ignore", divide="ignore"):
        sm = after[:, 0] / after[:, pc] - before[:, 0] / before[:, pc]
        out = []
        for d in indices:
            k = mapping.labels.index(d.buffer)
            bm = after[:, k] / after[:, pc] - before[:, k] / before[:, pc]
            q = bm / sm
            q = q[np.isfinite(q)]
            lo, hi = np.quantile(q, [(1 - level) / 2, (1 + level) / 2]) if q.size else (np.nan,) * 2
            out.append(replace(d, wdq_low=float(lo), wdq_high=float(hi)))
    return out


def _floor(design: Design, floor: float | None) -> float:
    """The positivity floor: the argument, else the spec's, else the default."""
    return design.positivity_floor if floor is None else float(floor)


def _plan_rows(
    design: Design, probs: np.ndarray, floor: float, notes: list[str]
) -> list[tuple[int, Estimand, np.ndarray | None]]:
    """The rows: (condition, units, focal units of the exact test or None), main rows first."""
    mapping = design.mapping
    pc, labels = mapping.pure_control, mapping.labels
    direct = contrast_units(
        probs, design.eligible, 0, pc, group="eligible", labels=labels, floor=floor
    )
    if direct.n_units == 0:
        raise InputError(_no_direct_units(design, probs, floor, direct))
    plan: list[tuple[int, Estimand, np.ndarray | None]] = [(0, direct, None)]
    for k in range(1, pc):
        est = contrast_units(
            probs, design.eligible, k, pc, group="never-eligible", labels=labels, floor=floor
        )
        focal = np.flatnonzero(est.units)
        if focal.size < MIN_FOCAL and isinstance(design.sampler, CompleteSampler):
            chosen = _random_focal_units(design, probs, k)
            within = np.zeros(design.units.n, dtype=bool)
            within[chosen] = True
            est = contrast_units(
                probs,
                design.eligible,
                k,
                pc,
                group="all",
                within=within,
                labels=labels,
                floor=floor,
            )
            focal = np.flatnonzero(est.units)
            notes.append(
                f"{labels[k]}: too few units are never treated, so the spillover test holds the "
                f"assignment of {focal.size} focal units chosen at random (from the design's "
                "seed, before looking at outcomes) and redraws the rest; the band's row is about "
                "those units"
            )
        if est.n_units == 0:
            notes.append(
                f"{labels[k]}: no row: no unit has both P({labels[k]}) and P({labels[pc]}) at "
                f"least the positivity floor {floor:g} ({est.n_candidates} can be in the band, "
                f"{est.n_below_floor} of them below the floor)"
            )
            continue
        if focal.size < MIN_FOCAL:
            notes.append(
                f"{labels[k]}: only {focal.size} units that are never treated can be in this "
                "band or pure controls; no exact spillover test"
            )
            plan.append((k, est, None))
        else:
            plan.append((k, est, focal))
    for k in range(1, pc):
        est = contrast_units(
            probs, design.eligible, k, pc, group="eligible", labels=labels, floor=floor
        )
        ess = min(est.expected_ess_exposure, est.expected_ess_reference)
        if est.n_units >= MIN_FOCAL and ess >= MIN_ROW_ESS:
            plan.append((k, est, None))
        else:
            notes.append(
                f"{labels[k]}: no row for the eligible units next to treated units ({est.n_units} "
                f"units, expected effective sample size {ess:.0f} on the thinner side; at least "
                f"{MIN_ROW_ESS} needed)"
            )
    return plan


def _hajek_rate_ratio(obs: Observed, probs: np.ndarray, k: int, l: int, units: np.ndarray) -> float:
    """Rate ratio: each side's Hajek mean of post-period counts over that of pre-period counts."""
    y, baseline = obs.post, obs.pre
    hk, hl = units & (obs.conditions == k), units & (obs.conditions == l)
    if not hk.any() or not hl.any():
        return float("nan")
    wk, wl = 1 / probs[hk, k], 1 / probs[hl, l]
    with np.errstate(invalid="ignore", divide="ignore"):
        rk = np.average(y[hk], weights=wk) / np.average(baseline[hk], weights=wk)
        rl = np.average(y[hl], weights=wl) / np.average(baseline[hl], weights=wl)
        return float(rk / rl) if rl > 0 else float("nan")


def _sensitivity(
    obs: Observed, probs: np.ndarray, k: int, l: int, units: np.ndarray
) -> dict[str, float]:
    """The row's estimate under the other outcome definitions (same units, same weights)."""
    pre, post, observed = obs.pre, obs.post, obs.conditions

    def hajek_difference(v: np.ndarray) -> float:
        hk, hl = units & (observed == k), units & (observed == l)
        if not hk.any() or not hl.any():
            return float("nan")
        return float(
            np.average(v[hk], weights=1 / probs[hk, k])
            - np.average(v[hl], weights=1 / probs[hl, l])
        )

    out = {}
    if obs.outcome != "change":
        out["change from the pre-period"] = hajek_difference(post - pre)
    if obs.outcome != "post":
        out["post-period only"] = hajek_difference(post)
    out["post-period adjusted for the pre-period (Lin 2013)"] = adjusted_contrast(
        post, pre, observed, probs, k, l, units
    )
    return out


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


def save_results(
    trial: TrialFile | str | os.PathLike[str],
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

    Parameters
    ----------
    trial : TrialFile, str or pathlib.Path
        The trial file (or its path) the analysis was computed from.
    analysis : Analysis
        The analysis, from :func:`analyse`.
    wait_s : float, optional
        Seconds to wait for another writer of the same trial.
    notify : callable, optional
        Receives plain-words notes (a wait for another writer, say).

    Returns
    -------
    TrialFile
        The trial file, opened again after the write.

    Raises
    ------
    geoexp.errors.TrialIntegrityError
        The trial's design or outcomes changed since the analysis.
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


def _no_direct_units(design: Design, probs: np.ndarray, floor: float, direct: Estimand) -> str:
    """Why the direct effect has no units, and what the user can change."""
    labels, pc = design.mapping.labels, design.mapping.pure_control
    eligible = design.eligible
    p_treated = probs[eligible, 0]
    p_control = probs[eligible, pc]
    top = float(p_treated.max()) if p_treated.size else 0.0
    return (
        f"no eligible unit has both P({labels[0]}) and P({labels[pc]}) at least the positivity "
        f"floor {floor:g}, so the direct effect cannot be estimated ({int(eligible.sum())} "
        f"eligible units; the largest P({labels[0]}) is {top:.3g}, the largest "
        f"P({labels[pc]}) {float(p_control.max()) if p_control.size else 0.0:.3g}). A design "
        "that treats a small share of many eligible units gives every unit a small chance of "
        "treatment: make fewer units eligible (e.g. [eligible] top_k), treat more of them, or "
        "declare a lower floor with [exposure] positivity_floor (weights up to one over the "
        "floor; the design check says whether the rows stay reliably estimable)"
    )
