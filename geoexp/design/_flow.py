"""The flow of units through a design: all units, each eligibility step, randomized, analysed.

The counts are recomputed from the spec's own ``[eligible]`` steps, in the
order :func:`geoexp.design.eligible_for` applies them (the rule, the exclusion
zones, then the hot-spot cut with its tie-break by ascending id), and checked
against the design's eligible units: a flow that does not end at the design's
own number of eligible units is refused, never drawn.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from geoexp.errors import DesignError

if TYPE_CHECKING:
    from geoexp.design._assignment import Assignment
    from geoexp.design._design import Design
    from geoexp.design._spec import DesignSpec
    from geoexp.units import UnitSet


@dataclass(frozen=True)
class FlowStep:
    """One box of the flow: units left after a step, and units the step removed.

    Attributes
    ----------
    label : str
        What the step is, in plain words.
    n_units : int
        Units left after the step.
    n_removed : int
        Units the step removed (0 for the first box).
    detail : str
        The rule of the step, as the design notes it.
    """

    label: str
    n_units: int
    n_removed: int = 0
    detail: str = ""


@dataclass(frozen=True)
class UnitFlow:
    """The units at each step of a design, from the layer to the analysis.

    Attributes
    ----------
    steps : tuple of FlowStep
        In order: all units, after the rule, after the exclusion zones, after
        the hot-spot cut (eligible), randomized (treated / not treated), and
        analysed when an analysis is given.
    n_units, n_eligible : int
        Units in the layer, and eligible units of the design.
    n_treated : int or None
        Treated units of the drawn assignment.
    n_tied_dropped : int
        Units tied at the hot-spot cut-off value and left out by the tie-break.
    n_analysed : int or None
        Units with outcomes in the analysis.
    recorded : bool
        True when the eligibility steps could not be recomputed (the design
        came with its eligible units as recorded); then the eligibility steps
        are one box.
    """

    steps: tuple[FlowStep, ...]
    n_units: int
    n_eligible: int
    n_treated: int | None
    n_tied_dropped: int
    n_analysed: int | None
    recorded: bool = False

    def __str__(self) -> str:
        lines = ["Units through the design:"]
        for s in self.steps:
            removed = f" ({s.n_removed:,} removed)" if s.n_removed else ""
            detail = f" — {s.detail}" if s.detail else ""
            lines.append(f"  {s.label}: {s.n_units:,} units{removed}{detail}")
        return "\n".join(lines)


def unit_flow(
    design: Design,
    assignment: Assignment | None = None,
    *,
    n_analysed: int | None = None,
) -> UnitFlow:
    """Count the units at each step of ``design``: all, rule, zones, hot-spot cut, randomized.

    Parameters
    ----------
    design : Design
        The design whose eligibility steps (rule, exclusion zones, hot-spot
        cut) are recomputed from its spec and units.
    assignment : Assignment, optional
        The drawn assignment, for the randomized box (treated and not treated).
    n_analysed : int, optional
        Units with outcomes in the analysis, for the last box.

    Returns
    -------
    UnitFlow

    Raises
    ------
    DesignError
        If the recomputed steps do not end at the design's eligible units.
    """
    return unit_flow_of(
        design.spec,
        design.units,
        design.eligible,
        n_treated=None if assignment is None else assignment.n_treated,
        n_analysed=n_analysed,
    )


def unit_flow_of(
    spec: DesignSpec,
    units: UnitSet,
    eligible: np.ndarray,
    *,
    n_treated: int | None = None,
    n_analysed: int | None = None,
) -> UnitFlow:
    """The flow of :func:`unit_flow` from a spec, its units and eligible mask, without a design.

    A report of a stored trial needs only these (not the exposure graph that
    building a :class:`~geoexp.design.Design` costs).

    Parameters
    ----------
    spec : DesignSpec
        The design spec whose eligibility steps are recomputed.
    units : UnitSet
        The spec's units.
    eligible : numpy.ndarray of bool
        The design's eligible units (a mask over ``units``).
    n_treated : int, optional
        Treated units of the drawn assignment, for the randomized box.
    n_analysed : int, optional
        Units with outcomes in the analysis, for the last box.

    Returns
    -------
    UnitFlow

    Raises
    ------
    DesignError
        If the recomputed steps do not end at the eligible units.
    """
    from geoexp.design._build import eligible_for

    eligible = np.asarray(eligible, dtype=bool)
    e = spec.eligible
    n_all = units.n
    n_eligible = int(eligible.sum())
    steps = [FlowStep("All units in the layer", n_all, 0, Path(str(units.source)).name)]
    tied_dropped = 0
    recorded = False
    try:
        current = units
        if e.where:
            after = current.select(e.where)
            steps.append(
                FlowStep("Meet the rule", after.n, current.n - after.n, f"where {e.where}")
            )
            current = after
        for zone in e.exclude:
            after = current.exclude(spec.resolve(zone), how=e.exclude_how)
            steps.append(
                FlowStep("Outside the exclusion zones", after.n, current.n - after.n, zone)
            )
            current = after
        if e.top_column:
            after = current.top(e.top_column, k=e.top_k, share=e.top_share)
            values = current.frame[e.top_column].to_numpy(dtype=float)
            kept_values = after.frame[e.top_column].to_numpy(dtype=float)
            cut = kept_values.min() if kept_values.size else np.nan
            tied_dropped = int(
                np.count_nonzero(values == cut) - np.count_nonzero(kept_values == cut)
            )
            how = f"top {e.top_k:,}" if e.top_k is not None else f"top share {e.top_share:g}"
            steps.append(
                FlowStep(
                    "Hot spots (eligible)",
                    after.n,
                    current.n - after.n,
                    f"{how} by {e.top_column}; {tied_dropped:,} tied at the cut-off value "
                    f"{cut:g} left out by the tie-break (ascending id)",
                )
            )
            current = after
        recomputed = np.asarray(units.ids.isin(eligible_for(spec, units).ids))
        recorded = not np.array_equal(recomputed, eligible)
    except (ValueError, OSError):
        recorded = True
    if recorded or steps[-1].n_units != n_eligible:
        steps = [steps[0], FlowStep("Eligible (as recorded)", n_eligible, n_all - n_eligible)]
        tied_dropped = 0
        recorded = True
    elif len(steps) == 1:
        steps.append(FlowStep("Eligible", n_eligible, 0, "every unit"))
    if n_treated is not None:
        n_treated = int(n_treated)
        steps.append(
            FlowStep(
                "Randomized",
                n_eligible,
                0,
                f"{n_treated:,} treated, {n_eligible - n_treated:,} eligible not treated",
            )
        )
    if n_analysed is not None:
        steps.append(
            FlowStep(
                "Analysed (units with outcomes)",
                int(n_analysed),
                0,
                "every unit in the layer, treated or not, whose counts were stored",
            )
        )
    flow = UnitFlow(tuple(steps), n_all, n_eligible, n_treated, tied_dropped, n_analysed, recorded)
    eligibility = [
        s
        for s in flow.steps
        if s.label not in ("Randomized",) and not s.label.startswith("Analysed")
    ]
    if n_all - sum(s.n_removed for s in eligibility) != n_eligible:
        raise DesignError(
            f"the unit flow does not add up: {n_all} units less the removed ones is not the "
            f"design's {n_eligible} eligible units"
        )
    return flow
