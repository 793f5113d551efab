"""The effect of treatment received in a trial file: dose from presence, beside the ITT."""

from __future__ import annotations

import os
from pathlib import Path
from typing import TYPE_CHECKING, Literal

import numpy as np

from geoexp._rng import Stream
from geoexp.delivery._complier import ComplierEffect, complier_effect
from geoexp.delivery._table import StayTable
from geoexp.errors import InputError
from geoexp.exposure import condition_bits, contrast_units
from geoexp.outcomes import load_outcomes
from geoexp.trialfile import TrialFile, design_from_trial, verify_trial

if TYPE_CHECKING:
    from geoexp.design import Assignment, Design


def received_inputs(
    trial: TrialFile | str | os.PathLike,
    stays: StayTable,
    outcome: Literal["change", "post"] = "change",
) -> tuple[Design, Assignment, np.ndarray, np.ndarray, tuple[str, str]]:
    """The design, assignment, outcome per unit, minutes present in the post-period and that period.

    The trial is verified first (a changed design or outcome table is refused).

    Parameters
    ----------
    trial : TrialFile or path
        A trial file with a drawn assignment and stored outcomes.
    stays : StayTable
        Stays at the trial's units (from a visit log or GPS pings).
    outcome : {"change", "post"}
        The outcome per unit: post-period incidents less pre-period incidents
        (``"change"``), or post-period incidents alone (``"post"``).

    Returns
    -------
    design : geoexp.design.Design
        The trial's design.
    assignment : geoexp.design.Assignment
        The drawn assignment.
    y : numpy.ndarray
        The outcome per unit in the design's unit order (incidents).
    minutes : numpy.ndarray
        Minutes present per unit over the post-period (0 where no stay).
    period : tuple of str
        First and last day of the post-period (ISO dates).
    """
    tf = trial if isinstance(trial, TrialFile) else TrialFile.open(Path(trial))
    verify_trial(tf)
    design, assignment = design_from_trial(tf)
    outcomes = load_outcomes(tf)
    if outcome not in ("change", "post"):
        raise InputError(f"outcome must be 'change' or 'post', got {outcome!r}")
    counts = outcomes.counts.reindex(design.units.ids)
    if counts["post"].isna().any():
        raise InputError("the stored outcomes do not cover every unit of the trial")
    post = counts["post"].to_numpy(dtype=float)
    y = post - counts["pre"].to_numpy(dtype=float) if outcome == "change" else post
    first, last = (str(d) for d in outcomes.post)
    minutes = (
        stays.dosage("period", start=first, end=last)
        .per_unit()["minutes"]
        .reindex(design.units.ids, fill_value=0.0)
        .to_numpy(dtype=float)
    )
    return design, assignment, y, minutes, (first, last)


def treatment_received(
    trial: TrialFile | str | os.PathLike,
    stays: StayTable,
    *,
    planned_minutes: float | None = None,
    outcome: Literal["change", "post"] = "change",
    n_draws: int = 2000,
    level: float = 0.95,
) -> ComplierEffect:
    """Complier effect of the trial's treatment, dose measured over the post-period.

    The dose of each unit is its minutes present during the outcome table's
    post-period (both days included). With ``planned_minutes`` the dose is
    binary instead: 1 when the unit's minutes present per week of the
    post-period reached the plan, so the ratio is the complier effect of
    Angrist, Imbens & Rubin (1996); without it the ratio is the effect per
    minute of presence. The contrast is treated against pure control over the
    analysis's direct-effect units (eligible units whose probabilities of both
    reach the design's positivity floor), so its ITT is the analysis's estimate, with
    the exposure probabilities of the design's own Monte Carlo (the same
    stream as the analysis), and the test is the design's randomization test
    of the ITT (see :func:`complier_effect`).

    Parameters
    ----------
    trial : TrialFile or path
        A trial with an assignment and stored outcomes.
    stays : StayTable
        Presence from :func:`stays_from_pings` or :func:`read_visits`.
    planned_minutes : float, optional
        Planned minutes per treated place per week; gives a binary dose.
    outcome : {"change", "post"}
        Post minus pre (default) or the post-period count.
    n_draws : int
        Draws of the design for the test and the interval.
    level : float
        Confidence level.

    Returns
    -------
    ComplierEffect
    """
    design, assignment, y, minutes, (first, last) = received_inputs(trial, stays, outcome)
    if planned_minutes is not None:
        if not (np.isfinite(planned_minutes) and planned_minutes > 0):
            raise InputError(f"planned_minutes must be a positive number, got {planned_minutes!r}")
        weeks = ((np.datetime64(last) - np.datetime64(first)).astype(int) + 1) / 7.0
        dose = (minutes / weeks >= planned_minutes).astype(float)
        label = f"place at the planned dose ({planned_minutes:g} min/week)"
    else:
        dose, label = minutes, "minute present"
    bits = condition_bits(
        design.sampler,
        design.graph,
        design.mapping,
        design.spec.draws,
        design.stream(Stream.MONTE_CARLO),
    )
    probs = bits.probabilities()
    # the analysis's direct-effect row: eligible units with both probabilities at the floor
    row = contrast_units(
        probs,
        design.eligible,
        0,
        design.mapping.pure_control,
        group="eligible",
        labels=design.mapping.labels,
        floor=design.positivity_floor,
    )
    return complier_effect(
        design,
        assignment.conditions.astype(np.int64),
        y,
        dose,
        probs,
        units=row.units,
        units_words=row.who,
        n_draws=n_draws,
        level=level,
        dose_label=label,
    )
