"""One context object holding everything the results report says, for every format."""

from __future__ import annotations

import json
import os
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from geoexp.cautions import CAUTION
from geoexp.graph import NetworkInfo
from geoexp.maps import PRINT_RC
from geoexp.report._calibration import interval_caveat
from geoexp.report._figures import distance_decay_plot, png_bytes
from geoexp.report._over_time import OverTimeSection
from geoexp.report._plan import FLOW_TITLE, PLAN_TITLE, plan_facts

if TYPE_CHECKING:
    from geoexp.analysis import Analysis
    from geoexp.trialfile import TrialFile


RESULT_MAP_TITLE = "Result map: observed change per unit by condition"

READING = (
    "Effects are in incidents per unit; a reduction is negative, and more incidents "
    "next to treated units (displacement) is positive. Each row is about one set of units, "
    "named in its finding, and every number of the row is computed over those units. The "
    "interval printed beside each verdict inverts the very randomization test whose p-value "
    "is shown (equal-tailed, two-sided), so the interval excludes 0 exactly when that test "
    "rejects. The normal-approximation interval (Aronow–Samii variance bound) is shown only "
    "where the design gives it enough effective units, and is labelled as an approximation "
    "that can miscover in small trials. Rejecting “no effect at all” (the whole-trial test, "
    "shown once) is not evidence of spillover; the spillover rows rest on their own tests."
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
    "probabilities from draws of the design's own sampler, over each row's units (a "
    "positivity floor on the exposure probabilities, Kish effective sample sizes); "
    "equal-tailed randomization tests of no additive effect and their inversion into "
    "intervals for a constant additive effect (Fisher 1935; Rosenbaum 2002); post-period "
    "rate ratios with intervals by inverting a multiplicative-effect test; Fisher randomization "
    "test of no effect at all for the trial; conditional randomization tests of no "
    "spillover on focal units that are never treated (Athey, Eckles & Imbens 2018); the "
    "pre-period-adjusted estimate of Lin (2013) as a sensitivity check; the weighted "
    "displacement quotient of Bowers & Johnson (2003)."
)
MORE_FINDINGS_TITLE = "Further rows and the whole trial"
ROWS_TITLE = "Every contrast row and its units"
ROWS_TEXT = (
    "One line per row, every number over the row's own units: the interval by test "
    "inversion (beside the verdict), the post-period rate ratio with its inverted interval, "
    "and the estimate under the other outcome definitions (sensitivity)."
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
    more_findings : tuple of str
        The rows beyond the main ones (eligible units next to treated units) and
        the whole trial's test of no effect at all, shown once.
    rows : pandas.DataFrame or None
        Every contrast row (eligible neighbours included) with its units,
        interval, rate ratio and sensitivity line.
    plan : pandas.DataFrame or None
        The trial at a glance (periods, eligibility rule, number treated, gap,
        bands, tool version), when the trial file is given.
    over_time : OverTimeSection or None
        Incidents per unit by condition over time, the pre-trend check and
        the effects per post period, when dated counts were given (else a
        note in ``notes`` says why the section is left out).
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
    rows: pd.DataFrame | None = None
    more_findings: tuple[str, ...] = ()
    more_findings_title: str = MORE_FINDINGS_TITLE
    reading: str = READING
    rows_title: str = ROWS_TITLE
    rows_text: str = ROWS_TEXT
    saturation_title: str = SATURATION_TITLE
    saturation_text: str = SATURATION_TEXT
    displacement_title: str = DISPLACEMENT_TITLE
    displacement_text: str = DISPLACEMENT_TEXT
    positivity_note: str = POSITIVITY_NOTE
    methods: str = METHODS
    plan: pd.DataFrame | None = None
    plan_title: str = PLAN_TITLE
    over_time: OverTimeSection | None = None

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
                "ci_by_test_inversion": f"{analysis.intervals[i][0]:+.2f} to {analysis.intervals[i][1]:+.2f}",
                "p (the interval's test)": f"{analysis.verdicts[i].p_value:.4f}",
                "approximate ci (normal; can miscover in small trials)": (
                    f"{e.ci_low:+.2f} to {e.ci_high:+.2f}"
                    if i < len(analysis.rows) and analysis.rows[i].show_approximation
                    else "—"
                ),
                "p_no_effect (± MC error)": _p(analysis.fisher[i]) if analysis.fisher[i] else "—",
                "p_no_spillover (± MC error)": _p(s) if s else "—",
                "units_in_estimand": e.n_units,
                "exposed": e.n_exposure,
                "reference": e.n_reference,
                "excluded": e.n_excluded,
                "finding": analysis.verdicts[i].finding,
            }
        )
    return pd.DataFrame(rows).set_index("contrast")


def _interval(low: float, high: float, fmt: str = "+.2f") -> str:
    if not (np.isfinite(low) or np.isfinite(high)):
        return "—"
    return f"{low:{fmt}} to {high:{fmt}}"


def _rows(analysis: Analysis) -> pd.DataFrame | None:
    """Every contrast row with the numbers its verdict sentence rests on."""
    if not analysis.rows:
        return None
    level = int(round(100 * analysis.level))
    out = []
    for r in analysis.rows:
        rr = r.rate_ratio
        out.append(
            {
                "row": r.label,
                "units": r.estimand.who,
                "units in row": r.estimand.n_units,
                "effective units (exposed / reference)": (
                    f"{r.effect.ess_exposure:.0f} / {r.effect.ess_reference:.0f}"
                ),
                "estimate (incidents per unit)": f"{r.effect.estimate:+.2f}",
                f"{level}% interval (test inversion)": _interval(
                    r.additive.ci_low, r.additive.ci_high
                ),
                "p (the interval's test)": f"{r.additive.test.p_value:.4f}",
                "approximate interval (normal; can miscover in small trials)": (
                    _interval(r.effect.ci_low, r.effect.ci_high) if r.show_approximation else "—"
                ),
                "rate ratio (post-period)": f"{rr.estimate:.2f}" if rr else "—",
                f"rate ratio {level}% interval": _interval(rr.ci_low, rr.ci_high, ".2f")
                if rr
                else "—",
                "sensitivity (other outcome definitions, incidents per unit)": "; ".join(
                    f"{k}: {v:+.2f}" for k, v in r.sensitivity.items()
                )
                or "—",
                "finding": r.verdict.finding,
                "interval caveat": interval_caveat(
                    "direct" if r.exposure_code == "treated" else "spillover"
                ),
            }
        )
    return pd.DataFrame(out).set_index("row")


def _more_findings(analysis: Analysis) -> tuple[str, ...]:
    """Rows beyond the main ones (eligible neighbours), then the whole trial's test, once."""
    found = [r.verdict.sentence for r in analysis.rows[len(analysis.verdicts) :]]
    whole = analysis.fisher[0] if analysis.fisher else None
    if whole is not None:
        found.append(
            f"Whole trial, test of no effect at all on any unit (not evidence of spillover): "
            f"p = {whole.p_value:.4f} ± {whole.mc_error:.4f}"
        )
    return tuple(found)


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
    over_time: OverTimeSection | str | None = None,
) -> ReportContext:
    """Gather the report of ``analysis`` into one :class:`ReportContext`.

    ``report_path`` is where the report will be written (links are relative to
    it). See :func:`geoexp.report.write_report` for the other parameters.

    Parameters
    ----------
    analysis : geoexp.analysis.Analysis
        The analysis to report.
    report_path : str or pathlib.Path
        Where the report will be written.
    trial : TrialFile, optional
        The trial file, for the static result map.
    extra_figures : dict of str to callable, optional
        Further figures: title to ``f(ax)``, each drawn on a 7 by 7 inch
        figure.
    result_map_html : str or pathlib.Path, optional
        The interactive result map to link to.
    static_map : bool, default True
        Include the static result map (when ``trial`` is given).
    districts : str, os.PathLike or geopandas.GeoDataFrame, optional
        District polygons for the static result map.
    over_time : OverTimeSection or str, optional
        The "Over time" section (:func:`geoexp.report.over_time_section`), or
        one line saying why it is left out (added to the notes).

    Returns
    -------
    ReportContext
        Everything the HTML, Markdown and PDF reports show, figures rendered
        as PNG.
    """
    from geoexp.trialfile import shared_reads

    # the map and the unit flow both read the unit layer: from disk once
    with shared_reads():
        return _report_context(
            analysis,
            report_path=report_path,
            trial=trial,
            extra_figures=extra_figures,
            result_map_html=result_map_html,
            static_map=static_map,
            districts=districts,
            over_time=over_time,
        )


def _report_context(
    analysis: Analysis,
    *,
    report_path: str | Path,
    trial: TrialFile | None,
    extra_figures: dict[str, Callable] | None,
    result_map_html: str | Path | None,
    static_map: bool,
    districts,
    over_time: OverTimeSection | str | None,
) -> ReportContext:
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
    if meta.get("coordinates"):
        design_rows["coordinates"] = meta["coordinates"]
    if meta.get("network"):
        info = NetworkInfo(**json.loads(meta["network"]))
        design_rows["street network"] = info.describe()
    return ReportContext(
        title=analysis.name,
        caution=CAUTION,
        findings=tuple(v.sentence for v in analysis.verdicts),
        more_findings=_more_findings(analysis),
        result_map_link=link,
        design=pd.DataFrame({"value": design_rows}),
        estimates=_estimates(analysis),
        saturation=analysis.saturation,
        displacement=wdq,
        figures=tuple(figures),
        notes=tuple(analysis.notes) + ((over_time,) if isinstance(over_time, str) else ()),
        rows=_rows(analysis),
        plan=plan,
        over_time=over_time if isinstance(over_time, OverTimeSection) else None,
    )
