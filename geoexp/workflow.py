"""The steps after a trial, as one call each: count incidents, then analyse and report.

:func:`count_and_store` reads incident points (one
:class:`~geoexp.outcomes.ObservedIncidents`), counts them per unit and period
(stopping on counts that would mislead, see
:func:`geoexp.outcomes.count_incidents`) and stores them in the trial file.
:func:`analyse_trial` runs the analysis of a trial file, stores the results in
it and writes the interactive results map and the HTML report with its
Markdown twin. Both refuse, before anything is written, an output that would
overwrite the trial file or an input (:func:`geoexp._paths.check_outputs`).

This module sits on top of the package: it may use analysis, maps and the
report writer; nothing in the package imports it except the command line and
the demo.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

from geoexp._paths import check_outputs, writing
from geoexp.analysis import Analysis
from geoexp.outcomes import MAX_DROPPED_SHARE, ObservedIncidents, OutcomeTable
from geoexp.trialfile import TrialFile

__all__ = ["AnalysisRun", "analyse_trial", "count_and_store", "report_outputs"]

PathLike = str | os.PathLike


def count_and_store(
    trial: PathLike,
    observed: ObservedIncidents,
    *,
    dropped_path: PathLike | None = None,
    max_dropped_share: float | None = MAX_DROPPED_SHARE,
) -> OutcomeTable:
    """Count incidents per unit and period and store the counts in the trial file.

    Parameters
    ----------
    trial : path
        The trial GeoPackage (written: its outcomes layer is replaced).
    observed : geoexp.outcomes.ObservedIncidents
        The incidents, the pre- and post-period and how to read them.
    dropped_path : path, optional
        CSV of the incidents not counted, with a ``reason`` column.
    max_dropped_share : float or None
        Largest share of incidents that may be dropped (default 0.5); see
        :func:`geoexp.outcomes.count_incidents`. The value is recorded in the
        drop report and in the trial file's meta key
        ``outcomes_max_dropped_share``.

    Returns
    -------
    OutcomeTable
        The counts as stored.

    Raises
    ------
    geoexp.errors.InputError
        Bad inputs, an output naming the trial file or the incidents, or
        counts that would mislead; nothing is written in these cases.
    """
    from geoexp.outcomes import save_outcomes

    incidents = observed.incidents
    inputs = {"the incidents": incidents} if isinstance(incidents, str | os.PathLike) else {}
    check_outputs({"dropped_path": dropped_path}, inputs, trial=trial)
    table = observed.count(
        TrialFile.open(trial), dropped_path=dropped_path, max_dropped_share=max_dropped_share
    )
    with writing(trial, "trial file"):
        stored = save_outcomes(trial, table)
        # A limit other than the default is a deliberate choice: keep it with the counts (and
        # replace one kept from an earlier count).
        key = "outcomes_max_dropped_share"
        if max_dropped_share != MAX_DROPPED_SHARE or key in stored.meta:
            value = "" if max_dropped_share is None else repr(float(max_dropped_share))
            stored.write_layers({}, meta={key: value})
    return table


@dataclass(frozen=True)
class AnalysisRun:
    """What :func:`analyse_trial` produced.

    Attributes
    ----------
    analysis : geoexp.analysis.Analysis
        The estimates, tests and verdicts.
    trial : Path
        The trial file, now holding the results.
    report, report_md : Path
        The HTML report and its Markdown twin.
    result_map : Path or None
        The interactive results map (HTML); None for a layer in local planar
        coordinates, which cannot be placed on a web map.
    report_pdf : Path or None
        The A4 PDF report, a one-page summary for command staff first.
    """

    analysis: Analysis
    trial: Path
    report: Path
    report_md: Path
    result_map: Path | None
    report_pdf: Path | None = None

    def __str__(self) -> str:
        where = (
            f"interactive results map: {self.result_map}"
            if self.result_map is not None
            else "no interactive results map: the units are in local planar coordinates (no "
            "CRS), which a web map cannot place; the report's own map needs none"
        )
        return (
            f"{self.analysis}\nReport: {self.report} (Markdown: {self.report_md}); {where}\n"
            f"PDF report (summary for command staff first): {self.report_pdf}\n"
            f"Results stored in {self.trial}"
        )


def report_outputs(report: PathLike, result_map: PathLike | None = None) -> dict[str, Path]:
    """Return the files :func:`analyse_trial` writes for ``report``: HTML, Markdown, PDF, map.

    The results map is ``results_map.html`` beside ``report.html`` (as in the
    demo), and ``<stem>_results_map.html`` beside a report of another name.

    Parameters
    ----------
    report : str or os.PathLike
        The HTML report's path.
    result_map : str or os.PathLike, optional
        The results map's path, if not the default one beside the report.

    Returns
    -------
    dict of str to pathlib.Path
        Keys ``report`` (HTML), ``report_md``, ``report_pdf`` (same name, other
        suffixes) and ``result_map``.
    """
    report = Path(report)
    name = "results_map.html" if report.stem == "report" else f"{report.stem}_results_map.html"
    map_path = report.with_name(name) if result_map is None else Path(result_map)
    return {
        "report": report,
        "report_md": report.with_suffix(".md"),
        "report_pdf": report.with_suffix(".pdf"),
        "result_map": map_path,
    }


def analyse_trial(
    trial: PathLike,
    *,
    report: PathLike = "report.html",
    result_map: PathLike | None = None,
    outcome: Literal["change", "post"] = "change",
    estimator: Literal["hajek", "horvitz-thompson"] = "hajek",
    n_draws: int = 2000,
    level: float = 0.95,
    districts=None,
    tiles: str | None = "auto",
    incidents: ObservedIncidents | None = None,
    period: Literal["week", "month"] = "month",
) -> AnalysisRun:
    """Analyse a trial file with stored outcomes; store the results; write map and report.

    Runs :func:`geoexp.analysis.analyse` (Aronow & Samii 2017 estimates;
    randomization tests of Fisher and of Athey, Eckles & Imbens 2018),
    :func:`geoexp.analysis.save_results`, the interactive results map and the
    report with its Markdown twin.

    Parameters
    ----------
    trial : path
        The trial GeoPackage, with outcomes (see :func:`count_and_store`).
    report : path
        The HTML report; the Markdown twin is the same name with ``.md``.
    result_map : path, optional
        The interactive results map; default ``results_map.html`` beside
        ``report.html``, else ``<report stem>_results_map.html``.
    outcome, estimator, n_draws, level
        As in :func:`geoexp.analysis.analyse`.
    districts : path or GeoDataFrame, optional
        District outlines drawn on the results map and the report's map.
    tiles : str or None
        Background tiles of the results map (``"auto"``: tiles only where the
        units lie on land the tiles cover); ``None`` for a plain background.
    incidents : geoexp.outcomes.ObservedIncidents, optional
        The dated incidents the outcomes were counted from (a CSV file or a
        frame with ISO dates). When given, the report gets the section "Over
        time" (:func:`geoexp.report.over_time_section`): incidents per unit by
        exposure condition per ``period`` from the start of the pre-period to
        the end of the post-period, the pre-trend check and the effect in each
        post period (Holm 1979); otherwise one line among the exclusions says
        why the section is left out.
    period : {"week", "month"}
        The period of the "Over time" section.

    Returns
    -------
    AnalysisRun

    Raises
    ------
    geoexp.errors.InputError
        An output naming the trial file, a folder, a path under a file, or
        two outputs on the same file (checked before anything is written);
        a write that fails (the file and the reason are named).
    """
    from geoexp.analysis import analyse, save_results
    from geoexp.maps import save_result_map
    from geoexp.report import write_report
    from geoexp.units import is_planar

    outs = report_outputs(report, result_map)
    labels = {
        "report": "the report",
        "report_md": "the report's Markdown twin",
        "report_pdf": "the report's PDF twin",
        "result_map": "the results map",
    }
    check_outputs({labels[k]: v for k, v in outs.items()}, {}, trial=trial)
    result = analyse(trial, outcome=outcome, estimator=estimator, n_draws=n_draws, level=level)
    with writing(trial, "trial file"):
        tf = save_results(trial, result)
    map_path = None
    # A layer declared planar has no place on the Earth: no web map, the report's
    # static map only.
    if not is_planar(tf.units().crs):
        with writing(outs["result_map"], "results map"):
            map_path = save_result_map(
                result, tf, outs["result_map"], tiles=tiles, districts=districts
            )
    over_time = _over_time(tf, incidents, period, n_draws=n_draws, level=level)
    with writing(outs["report"], "report"):
        html_path, md_path = write_report(
            result,
            outs["report"],
            trial=tf,
            result_map_html=map_path,
            districts=districts,
            pdf_path=outs["report_pdf"],
            over_time=over_time,
        )
    return AnalysisRun(
        result,
        Path(trial),
        Path(html_path),
        Path(md_path),
        None if map_path is None else Path(map_path),
        outs["report_pdf"],
    )


NO_DATED_COUNTS = (
    "No section 'Over time': {why}, so the incidents could not be counted per unit and {period}."
)


def _over_time(tf, observed, period, *, n_draws: int, level: float):
    """Build the report's "Over time" section, or one line saying why it is left out."""
    import pandas as pd

    from geoexp.delivery import incidents_by_period
    from geoexp.errors import InputError
    from geoexp.report import over_time_section
    from geoexp.units import UnitSet

    def missing(why: str) -> str:
        return NO_DATED_COUNTS.format(why=why, period=period)

    if observed is None:
        return missing("the analysis was given no dated incidents (only the stored counts)")
    units = UnitSet.from_frame(tf.units(), None, source=str(tf.path))
    if units.crs is None:
        return missing("the units are in local planar coordinates (no CRS)")
    try:
        # read exactly as the count step read them: any source, any date format
        frame = observed.points(units.crs)
        counts = incidents_by_period(
            units,
            frame,
            date_column="date",
            x="x",
            y="y",
            crs=units.crs,
            freq=period,
            tolerance_m=observed.tolerance_m,
        )
        first, last = pd.Timestamp(observed.pre[0]), pd.Timestamp(observed.post[1])
        kept = counts[(counts["period"] >= first) & (counts["period"] <= last)]
        kept = kept.reset_index(drop=True)
        kept.attrs.update(counts.attrs)
        window = (str(observed.post[0]), str(observed.post[1]))
        return over_time_section(tf, kept, window, n_draws=n_draws, level=level)
    except InputError as err:
        return missing(str(err).rstrip("."))
