"""The trial at a glance: periods, eligibility rule, number treated, gap, bands, tool version, unit flow."""

from __future__ import annotations

from typing import TYPE_CHECKING

import pandas as pd

if TYPE_CHECKING:
    from geoexp.analysis import Analysis
    from geoexp.design import DesignSpec, UnitFlow
    from geoexp.trialfile import TrialFile

PLAN_TITLE = "The trial at a glance"
FLOW_TITLE = "Units through the design"


def eligibility_words(spec: DesignSpec) -> str:
    """The spec's ``[eligible]`` steps in plain words, in the order they are applied."""
    e = spec.eligible
    parts = []
    if e.where:
        parts.append(f"units where {e.where}")
    if e.exclude:
        parts.append(
            "outside the exclusion zones in " + ", ".join(e.exclude) + f" ({e.exclude_how})"
        )
    if e.top_column:
        how = f"the top {e.top_k:,}" if e.top_k is not None else f"the top {e.top_share:g} share"
        parts.append(f"{how} by {e.top_column} (ties at the cut-off broken by ascending id)")
    return "; then ".join(parts) if parts else "every unit in the layer"


def _period(text: str) -> str:
    start, _, end = str(text).partition("/")
    return f"{start} to {end}" if end else str(text)


def plan_facts(analysis: Analysis, trial: TrialFile) -> tuple[pd.DataFrame, UnitFlow | None]:
    """The trial's plan as a one-column table, and the flow of its units (None if not rebuilt).

    The flow is recomputed from the spec stored in the trial file; when its
    inputs (such as zone files) are gone, the flow shows the eligible units as
    recorded.
    """
    from geoexp.design import tool_version, unit_flow_of
    from geoexp.units import UnitSet

    spec = trial.spec()
    meta = trial.meta
    # the counts need two columns: reading the layer's geometry would be most of the work
    assignment = trial.read_columns("assignment", ["treated", "eligible"])
    n_treated = int(assignment["treated"].astype(bool).sum())
    n_eligible = int(assignment["eligible"].astype(bool).sum())
    gap = spec.assignment.gap_m
    rows = {
        "pre-period": _period(meta.get("outcomes_pre", "not stored")),
        "post-period (the trial)": _period(meta.get("outcomes_post", "not stored")),
        "eligibility rule": eligibility_words(spec),
        "eligible units": f"{n_eligible:,} of {len(assignment):,} units",
        "number treated": f"{n_treated:,} units",
        "randomization": spec.assignment.method,
        "gap between treated units": f"{gap:g} m (no two treated units closer)" if gap else "none",
        "spillover bands": ", ".join(f"{b:g}" for b in spec.exposure.bands_m)
        + f" m ({spec.exposure.metric})",
        "geoexp version": f"{tool_version()} (design drawn with {meta.get('tool_version', '?')})",
    }
    # The flow needs the spec, the units and their eligibility, not the design's exposure graph
    # (the costliest part of rebuilding the design): the analysis being reported has already
    # checked the stored assignment against its spec and seed.
    try:
        frame = trial.units()
        units = UnitSet.from_frame(
            frame.drop(columns=["eligible"]), None, source=f"{trial.path} (units layer)"
        )
        eligible = frame["eligible"].astype(bool).to_numpy()
        treated = assignment["treated"].astype(bool).reindex(units.ids).to_numpy()
        analysed = int(analysis.per_unit["post"].notna().sum())
        flow = unit_flow_of(
            spec, units, eligible, n_treated=int(treated.sum()), n_analysed=analysed
        )
    except ValueError:
        flow = None
    return pd.DataFrame({"value": rows}), flow
