"""Rendering the report context with the package's templates, and writing the files."""

from __future__ import annotations

import base64
import functools
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Literal

import jinja2
from markupsafe import Markup

from geoexp._atomic import atomic_path
from geoexp._tables import html_table, markdown_table
from geoexp.report._context import ReportContext, report_context
from geoexp.report._over_time import OverTimeSection
from geoexp.report._pdf import write_pdf_report

if TYPE_CHECKING:
    from geoexp.analysis import Analysis
    from geoexp.trialfile import TrialFile


@functools.cache
def _environment(kind: Literal["html", "md"]) -> jinja2.Environment:
    env = jinja2.Environment(
        loader=jinja2.PackageLoader("geoexp.report", "templates"),
        autoescape=kind == "html",
        undefined=jinja2.StrictUndefined,
        keep_trailing_newline=True,
    )
    if kind == "html":
        env.filters["table"] = lambda frame: Markup(html_table(frame))
    else:
        env.filters["table"] = markdown_table
    env.filters["base64"] = lambda data: base64.b64encode(data).decode("ascii")
    return env


def render_report(
    context: ReportContext,
    kind: Literal["html", "md"],
    *,
    figure_files: Sequence[str] = (),
) -> str:
    """The report as text: ``"html"`` (figures embedded) or ``"md"``.

    ``figure_files`` names, for Markdown, the image file of each figure in order.

    Parameters
    ----------
    context : ReportContext
        The report's sections, numbers and figures.
    kind : {"html", "md"}
        HTML with the figures embedded as PNG, or Markdown.
    figure_files : sequence of str, default ()
        For Markdown, the image file name of each figure, in order.

    Returns
    -------
    str
        The report's text.

    Raises
    ------
    ValueError
        ``kind`` is neither ``"html"`` nor ``"md"``.
    """
    if kind not in ("html", "md"):
        raise ValueError(f"report kind must be 'html' or 'md', not {kind!r}")
    template = _environment(kind).get_template(f"report.{kind}.j2")
    return template.render(c=context, figure_files=list(figure_files))


def write_report(
    analysis: Analysis,
    path: str | Path,
    *,
    trial: TrialFile | None = None,
    extra_figures: dict[str, Callable] | None = None,
    result_map_html: str | Path | None = None,
    static_map: bool = True,
    districts=None,
    pdf_path: str | Path | None = None,
    over_time: OverTimeSection | str | None = None,
) -> tuple[Path, Path]:
    """Write the report as HTML (plots embedded) and a Markdown twin beside it.

    Both are rendered from one :class:`~geoexp.report.ReportContext`, so they
    carry the same sections, numbers and wording. ``extra_figures`` maps a title
    to a function ``f(ax)`` that draws on an Axes. When ``trial`` is given (and
    ``static_map`` is true) the report also embeds the static result map of
    :func:`geoexp.maps.result_map_static`. ``result_map_html`` is the path of
    the interactive result map (from :func:`geoexp.maps.result_map`), linked
    from both reports. ``districts`` (polygons, a path or GeoDataFrame) are
    drawn on the static result map instead of outlines around each district's
    units. ``pdf_path``, when given, also gets the report as an A4 PDF with a
    one-page summary for command staff first (:func:`write_pdf_report`).
    Returns (html_path, markdown_path); the Markdown's figures are PNG files
    beside it.

    Parameters
    ----------
    analysis : geoexp.analysis.Analysis
        The analysis to report.
    path : str or pathlib.Path
        The HTML report to write; the Markdown twin gets the same name with
        ``.md``.
    trial : TrialFile, optional
        The trial file, for the static result map.
    extra_figures : dict of str to callable, optional
        Further figures: title to ``f(ax)``.
    result_map_html : str or pathlib.Path, optional
        The interactive result map to link to.
    static_map : bool, default True
        Embed the static result map (when ``trial`` is given).
    districts : str, os.PathLike or geopandas.GeoDataFrame, optional
        District polygons for the static result map.
    pdf_path : str or pathlib.Path, optional
        Also write the A4 PDF report here.
    over_time : OverTimeSection or str, optional
        The "Over time" section (:func:`geoexp.report.over_time_section`), or
        one line saying why it is left out (shown among the exclusions).

    Returns
    -------
    tuple of pathlib.Path
        ``(html_path, markdown_path)``.
    """
    path = Path(path)
    md_path = path.with_suffix(".md")
    context = report_context(
        analysis,
        report_path=path,
        trial=trial,
        extra_figures=extra_figures,
        result_map_html=result_map_html,
        static_map=static_map,
        districts=districts,
        over_time=over_time,
    )
    with atomic_path(path) as tmp:
        tmp.write_text(render_report(context, "html"), encoding="utf-8")
    names = []
    for i, figure in enumerate(context.figures):
        img = md_path.with_name(f"{md_path.stem}_figure{i + 1}.png")
        with atomic_path(img) as tmp:
            tmp.write_bytes(figure.png)
        names.append(img.name)
    if context.over_time is not None:
        for tag, png in (
            ("over_time", context.over_time.series_png),
            ("period_effects", context.over_time.effects_png),
        ):
            img = md_path.with_name(f"{md_path.stem}_{tag}.png")
            with atomic_path(img) as tmp:
                tmp.write_bytes(png)
            names.append(img.name)
    with atomic_path(md_path) as tmp:
        tmp.write_text(render_report(context, "md", figure_files=names), encoding="utf-8")
    if pdf_path is not None:
        write_pdf_report(context, pdf_path)
    return path, md_path
