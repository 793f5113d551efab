"""One context object holding everything the results report says, for every format."""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import matplotlib
import pandas as pd
from matplotlib.figure import Figure

from geoexp.cautions import CAUTION
from geoexp.maps import PRINT_RC
from geoexp.report._figures import distance_decay_plot, png_bytes
from geoexp.report._plan import FLOW_TITLE, PLAN_TITLE, plan_facts

if TYPE_CHECKING:
    from geoexp.analysis import Analysis
    from geoexp.trialfile import TrialFile


RESULT_MAP_TITLE = "Result map: observed change per unit by condition"

READING = (
    "Effects are in incidents per unit; a reduction is negative, and more incidents "
    "next to treated units (displacement) is positive. Rejecting “no effect at all” is not "
    "evidence of spillover; the spillover verdicts rest on the conditional test of no "
    "spillover, which is exact but uses only the focal units that are never treated. The "
    "interval by test inversion uses every unit in the band under a constant-effect model, "
    "and the conservative interval uses the Aronow–Samii variance bound, so the three can "
    "disagree near the edge of significance."
)
SATURATION_TITLE = "Effects by saturation (randomized-saturation design)"
SATURATION_TEXT = (
    "Group means by the saturation each unit's cluster drew (Hudgens & "
    "Halloran 2008; Baird, Bohren, McIntosh & Özler 2018): total = direct + spillover."
)
DISPLACEMENT_TITLE = "Displacement or diffusion: weighted displacement quotient"
DISPLACEMENT_TEXT = (
    "Bowers & Johnson (2003): treated units as target area, each band as buffer, "
    "pure controls as control area."
)
POSITIVITY_NOTE = (
    "Each contrast covers only the units that could be in both of its conditions "
    "under the design (positivity); counts are in the estimates table."
)
METHODS = (
    "Horvitz–Thompson and Hajek estimators of exposure contrasts with the "
    "conservative variance of Aronow & Samii (2017), using exposure and joint "
    "probabilities from draws of the design's own sampler; Fisher randomization tests of "
    "no effect at all; conditional randomization tests of no spillover on focal units that "
    "are never treated (Athey, Eckles & Imbens 2018); intervals for a constant "
    "additive effect by test inversion; the weighted displacement quotient of Bowers "
    "& Johnson (2003)."
)


@dataclass(frozen=True)
class ReportFigure:
    """One figure of the report: its title and PNG bytes."""

    title: str
    png: bytes


@dataclass(frozen=True, eq=False)
class ReportContext:
    """Everything the results report says; each format renders this one object.

    Attributes
    ----------
    title : str
        The trial's name.
    caution : str
        The plain-words caution every output carries.
    findings : tuple of str
        One verdict sentence per contrast.
    result_map_link : str or None
        Link (relative where possible) to the interactive result map.
    design : pandas.DataFrame
        The design's facts, one ``value`` column.
    estimates : pandas.DataFrame
        One row per contrast.
    saturation : pandas.DataFrame or None
        Group means by saturation, for randomized-saturation designs.
    displacement : pandas.DataFrame
        Weighted displacement quotients (may be empty).
    figures : tuple of ReportFigure
        The figures, in order.
    notes : tuple of str
        What was excluded and why.
    plan : pandas.DataFrame or None
        The trial at a glance (periods, eligibility rule, number treated, gap,
        bands, tool version), when the trial file is given.
    """

    title: str
    caution: str
    findings: tuple[str, ...]
    result_map_link: str | None
    design: pd.DataFrame
    estimates: pd.DataFrame
    saturation: pd.DataFrame | None
    displacement: pd.DataFrame
    figures: tuple[ReportFigure, ...]
    notes: tuple[str, ...]
    reading: str = READING
    saturation_title: str = SATURATION_TITLE
    saturation_text: str = SATURATION_TEXT
    displacement_title: str = DISPLACEMENT_TITLE
    displacement_text: str = DISPLACEMENT_TEXT
    positivity_note: str = POSITIVITY_NOTE
    methods: str = METHODS
    plan: pd.DataFrame | None = None
    plan_title: str = PLAN_TITLE

    @property
    def result_map_name(self) -> str | None:
        """The file name of the interactive result map, for the link text."""
        return Path(self.result_map_link).name if self.result_map_link else None


def relative_link(target: str | Path, report: Path) -> str:
    """Link from the report to ``target``: relative when both share a drive, else a file URI."""
    target = Path(target)
    try:
        return Path(os.path.relpath(target.resolve(), report.resolve().parent)).as_posix()
    except ValueError:  # different drives on Windows
        return target.resolve().as_uri()


def _p(test) -> str:
    return f"{test.p_value:.4f} ± {test.mc_error:.4f}"


def _estimates(analysis: Analysis) -> pd.DataFrame:
    rows = []
    for i, e in enumerate(analysis.effects):
        s = analysis.spillover_tests[i]
        rows.append(
            {
                "contrast": e.contrast,
                "estimate": e.estimate,
                "std_error": e.std_error,
                "ci": f"{e.ci_low:+.2f} to {e.ci_high:+.2f}",
                "ci_by_test_inversion": f"{analysis.intervals[i][0]:+.2f} to {analysis.intervals[i][1]:+.2f}",
                "p_no_effect (± MC error)": _p(analysis.fisher[i]),
                "p_no_spillover (± MC error)": _p(s) if s else "—",
                "units_in_estimand": e.n_units,
                "exposed": e.n_exposure,
                "reference": e.n_reference,
                "excluded": e.n_excluded,
                "finding": analysis.verdicts[i].finding,
            }
        )
    return pd.DataFrame(rows).set_index("contrast")


def _figure(draw: Callable, size: tuple[float, float]) -> bytes:
    # User text (trial names, labels) is text, never math: a "$" must not start a formula.
    with matplotlib.rc_context({"text.parse_math": PRINT_RC["text.parse_math"]}):
        fig = Figure(figsize=size)
        draw(fig.subplots())
        return png_bytes(fig)


def report_context(
    analysis: Analysis,
    *,
    report_path: str | Path,
    trial: TrialFile | None = None,
    extra_figures: dict[str, Callable] | None = None,
    result_map_html: str | Path | None = None,
    static_map: bool = True,
    districts=None,
) -> ReportContext:
    """Gather the report of ``analysis`` into one :class:`ReportContext`.

    ``report_path`` is where the report will be written (links are relative to
    it). See :func:`geoexp.report.write_report` for the other parameters.
    """
    figures = [
        ReportFigure(
            "Effect by distance",
            _figure(lambda ax: distance_decay_plot(analysis, ax=ax), (6.4, 3.6)),
        )
    ]
    if trial is not None and static_map and RESULT_MAP_TITLE not in (extra_figures or {}):
        from geoexp.maps import result_map_static

        figures.append(
            ReportFigure(
                RESULT_MAP_TITLE,
                _figure(
                    lambda ax: result_map_static(analysis, trial, ax=ax, districts=districts),
                    (8.3, 8.3),
                ),
            )
        )
    for title, draw in (extra_figures or {}).items():
        figures.append(ReportFigure(title, _figure(draw, (7, 7))))
    plan = None
    if trial is not None:
        from geoexp.report._planning import flow_plot

        plan, flow = plan_facts(analysis, trial)
        if flow is not None:
            size = (6.4, 1.4 * len(flow.steps) + 0.4)
            figures.insert(
                0, ReportFigure(FLOW_TITLE, _figure(lambda ax: flow_plot(flow, ax), size))
            )
    link = (
        relative_link(result_map_html, Path(report_path)) if result_map_html is not None else None
    )
    wdq = (
        pd.concat([d.to_frame() for d in analysis.displacement])
        if analysis.displacement
        else pd.DataFrame()
    )
    meta = trial.meta if trial is not None else {}
    design_rows = {
        "trial": analysis.name,
        "design hash": analysis.spec_hash,
        "seed": meta.get("seed", ""),
        "assignment drawn": meta.get("drawn_at", ""),
        "outcome": analysis.outcome_words,
        "estimator": f"{analysis.estimator} (Horvitz–Thompson twin in the results layer)",
        "probability draws": str(analysis.n_draws_probabilities),
        "test draws": str(analysis.n_draws_tests),
        "distances": "metres" if analysis.distance_unit == "m" else "feet (international)",
    }
    return ReportContext(
        title=analysis.name,
        caution=CAUTION,
        findings=tuple(v.sentence for v in analysis.verdicts),
        result_map_link=link,
        design=pd.DataFrame({"value": design_rows}),
        estimates=_estimates(analysis),
        saturation=analysis.saturation,
        displacement=wdq,
        figures=tuple(figures),
        notes=tuple(analysis.notes),
        plan=plan,
    )
