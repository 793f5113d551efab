"""The results report: one context rendered as HTML (figures embedded) and as Markdown.

:func:`report_context` gathers everything the report says about an
:class:`geoexp.analysis.Analysis` (findings, design, estimates, displacement,
figures, exclusions, methods) into one :class:`ReportContext`;
:func:`write_report` renders it with the package's Jinja2 templates as an HTML
page that works offline and a Markdown twin with the same sections, numbers and
wording. :func:`distance_decay_plot` draws the effect by distance band.
:func:`over_time_section` builds the optional "Over time" section from
incidents counted per unit and week or month.
"""

from geoexp.report._context import RESULT_MAP_TITLE, ReportContext, report_context
from geoexp.report._figures import distance_decay_plot
from geoexp.report._over_time import OVER_TIME_TITLE, OverTimeSection, over_time_section
from geoexp.report._pdf import write_pdf_report
from geoexp.report._planning import (
    balance_plot,
    flow_plot,
    power_curve_plot,
    probability_plot,
    save_check_figures,
    save_power_figure,
)
from geoexp.report._write import render_report, write_report

__all__ = [
    "OVER_TIME_TITLE",
    "OverTimeSection",
    "over_time_section",
    "RESULT_MAP_TITLE",
    "ReportContext",
    "balance_plot",
    "distance_decay_plot",
    "flow_plot",
    "power_curve_plot",
    "probability_plot",
    "save_check_figures",
    "save_power_figure",
    "render_report",
    "report_context",
    "write_pdf_report",
    "write_report",
]
