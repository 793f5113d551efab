"""The report as an A4 PDF written by matplotlib: a one-page summary for command staff first.

Page one says what the trial was, how many places were treated, the headline
rows (each contrast's estimate in incidents per unit with its interval and
p-value, and the finding), and the cautions. The pages after it carry the
whole report: the trial at a glance, the design, every estimate, the
displacement quotients, the figures, what was excluded and the methods.

Tables are never cut: every row is set as wrapped lines of label and value
(one block per row), so a table of any width fits the page; the summary's
headline rows use a fixed set of narrow columns whose text wraps in its cell.
Text stays text in the file (TrueType fonts), so it can be searched and copied.
"""

from __future__ import annotations

import io
import textwrap
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from geoexp._atomic import atomic_path
from geoexp.maps import PRINT_RC

if TYPE_CHECKING:
    from matplotlib.figure import Figure

    from geoexp.report._context import ReportContext

A4_INCHES = (8.27, 11.69)
MARGIN = 0.06  # of the page width and height
# Characters per line of 9 pt DejaVu Sans across the text width (about 0.6 em per character).
CHARS_AT_9PT = 92
SUMMARY_COLUMNS = (
    "contrast",
    "estimate (incidents per unit)",
    "interval",
    "p, no effect",
    "finding",
)


class _Pages:
    """A cursor that sets text and images down A4 pages, starting a new page when one is full."""

    def __init__(self, pdf, title: str):
        self.pdf = pdf
        self.title = title
        self.fig: Figure | None = None
        self.y = 0.0
        self.number = 0

    def new_page(self) -> None:
        from matplotlib.figure import Figure

        self.flush()
        self.number += 1
        self.fig = Figure(figsize=A4_INCHES)
        self.fig.text(MARGIN, 0.025, f"{self.title} — page {self.number}", fontsize=7, color="0.4")
        self.y = 1 - MARGIN

    def flush(self) -> None:
        if self.fig is not None:
            self.pdf.savefig(self.fig)
            self.fig = None

    def room(self, height: float) -> None:
        if self.fig is None or self.y - height < MARGIN + 0.02:
            self.new_page()

    def text(self, text: str, size: float = 9, *, weight="normal", colour="black", indent=0.0):
        width = int(CHARS_AT_9PT * 9 / size * (1 - indent / (1 - 2 * MARGIN)))
        lines = []
        for para in str(text).split("\n"):
            lines += textwrap.wrap(para, width, break_long_words=True) or [""]
        line_h = size * 1.45 / 72 / A4_INCHES[1]
        for line in lines:
            self.room(line_h)
            assert self.fig is not None  # room() starts a page when none is open
            self.fig.text(
                MARGIN + indent,
                self.y,
                line,
                fontsize=size,
                fontweight=weight,
                color=colour,
                va="top",
            )
            self.y -= line_h
        self.y -= line_h * 0.3

    def heading(self, text: str, size: float = 12) -> None:
        self.room(0.08)
        self.y -= 0.008
        self.text(text, size, weight="bold")

    def rows(self, frame: pd.DataFrame) -> None:
        """Every row as a block: its index in bold, then 'column: value' lines, wrapped."""
        if frame is None or not len(frame):
            self.text("(none)")
            return
        for index, row in frame.iterrows():
            label = " / ".join(map(str, index)) if isinstance(index, tuple) else str(index)
            if list(frame.columns) == ["value"]:
                self.text(f"{label}: {_cell(row['value'])}", 8.5)
                continue
            self.text(label, 9, weight="bold")
            for column, value in row.items():
                self.text(f"{column}: {_cell(value)}", 8, indent=0.03)

    def image(self, png: bytes, title: str) -> None:
        from matplotlib.image import imread

        pixels = imread(io.BytesIO(png), format="png")
        h, w = pixels.shape[:2]
        width = 1 - 2 * MARGIN
        height = width * (h / w) * A4_INCHES[0] / A4_INCHES[1]
        top_room = 1 - 2 * MARGIN - 0.05
        if height > top_room:  # a tall figure: shrink to the page
            width *= top_room / height
            height = top_room
        self.heading(title, 11)
        self.room(height)
        assert self.fig is not None  # room() starts a page when none is open
        ax = self.fig.add_axes((MARGIN, self.y - height, width, height))
        ax.imshow(pixels)
        ax.set_axis_off()
        self.y -= height + 0.02


def _cell(value) -> str:
    if isinstance(value, (float, np.floating)):
        return f"{value:.3f}" if np.isfinite(value) else "—"
    return str(value)


def _summary_table(pages: _Pages, context: ReportContext) -> None:
    """The headline rows: contrast, estimate, interval, p-value and finding, wrapped in narrow cells."""
    est = context.estimates
    widths = (0.26, 0.14, 0.18, 0.14, 0.28)  # shares of the text width; they sum to 1
    x0, text_width = MARGIN, 1 - 2 * MARGIN
    size = 8
    per_char = size * 0.6 / 72 / A4_INCHES[0]  # page-width share of one character
    line_h = size * 1.4 / 72 / A4_INCHES[1]
    rows = [SUMMARY_COLUMNS]
    for contrast, r in est.iterrows():
        p = str(r.get("p_no_effect (± MC error)", "—"))
        rows.append(
            (
                str(contrast),
                f"{r['estimate']:+.2f}" if np.isfinite(r["estimate"]) else "—",
                str(r.get("ci", "—")),
                p,
                str(r.get("finding", "")),
            )
        )
    for i, row in enumerate(rows):
        cells = [
            textwrap.wrap(text, max(6, int(w * text_width / per_char)), break_long_words=True)
            or [""]
            for text, w in zip(row, widths, strict=True)
        ]
        height = max(len(c) for c in cells) * line_h + line_h * 0.5
        pages.room(height)
        assert pages.fig is not None  # room() starts a page when none is open
        x = x0
        for lines, w in zip(cells, widths, strict=True):
            pages.fig.text(
                x,
                pages.y,
                "\n".join(lines),
                fontsize=size,
                va="top",
                linespacing=1.25,
                fontweight="bold" if i == 0 else "normal",
            )
            x += w * text_width
        pages.y -= height
        pages.fig.add_artist(_rule(pages.y + line_h * 0.25, "0.3" if i == 0 else "0.8"))


def _rule(y: float, colour: str):
    from matplotlib.lines import Line2D

    return Line2D([MARGIN, 1 - MARGIN], [y, y], lw=0.6, color=colour)


def write_pdf_report(context: ReportContext, path: str | Path) -> Path:
    """Write the report as an A4 PDF, a one-page summary for command staff first.

    Parameters
    ----------
    context : ReportContext
        From :func:`geoexp.report.report_context`.
    path : path
        The PDF file to write (atomically).

    Returns
    -------
    pathlib.Path
    """
    import matplotlib
    from matplotlib.backends.backend_pdf import PdfPages

    path = Path(path)
    with matplotlib.rc_context(PRINT_RC), atomic_path(path) as tmp:
        with PdfPages(tmp, metadata={"Title": f"{context.title}: results"}) as pdf:
            pages = _Pages(pdf, context.title)
            pages.new_page()
            pages.text(f"{context.title}", 15, weight="bold")
            pages.text("Summary for command staff", 11, colour="0.3")
            if context.plan is not None:
                keep = [
                    "post-period (the trial)",
                    "number treated",
                    "eligible units",
                    "gap between treated units",
                ]
                for key in keep:
                    if key in context.plan.index:
                        pages.text(f"{key}: {context.plan.loc[key, 'value']}", 9)
            pages.heading("Headline results", 11)
            _summary_table(pages, context)
            pages.text(
                "Estimates are in incidents per unit over the trial period, against pure "
                "controls; a reduction is negative. The interval is the 95% interval; p is the "
                "randomization test of no effect at all (± its Monte Carlo error).",
                8,
                colour="0.25",
            )
            pages.heading("What it means", 11)
            for sentence in context.findings:
                pages.text(f"• {sentence}", 8.5)
            pages.heading("Cautions", 11)
            pages.text(context.caution, 8.5, colour="#8a3b00")
            pages.text(
                "Rejecting “no effect at all” is not evidence of spillover. The full report "
                "(next pages) gives every estimate, the design, and what was excluded and why.",
                8.5,
            )

            pages.new_page()
            if context.plan is not None:
                pages.heading(context.plan_title)
                pages.rows(context.plan)
            pages.heading("Design")
            pages.rows(context.design)
            pages.heading("Estimates")
            pages.text(context.reading, 8, colour="0.25")
            pages.rows(context.estimates)
            if context.saturation is not None:
                pages.heading(context.saturation_title)
                pages.text(context.saturation_text, 8)
                pages.rows(context.saturation)
            pages.heading(context.displacement_title)
            pages.text(context.displacement_text, 8)
            if len(context.displacement):
                pages.rows(context.displacement)
            else:
                pages.text("Not computable.")
            if context.over_time is not None:
                ot = context.over_time
                pages.heading(ot.title)
                pages.text(ot.intro, 8.5)
                pages.image(ot.series_png, "Incidents by exposure condition over time")
                pages.text(ot.pre_trend, 8.5)
                pages.image(ot.effects_png, f"Effect per post {ot.freq}")
                pages.text(
                    "The table of effects per period is in the HTML and Markdown reports.", 8.5
                )
                for note in ot.notes:
                    pages.text(f"• {note}", 8.5)
            for figure in context.figures:
                pages.image(figure.png, figure.title)
            pages.heading("What was excluded and why")
            for note in (*context.notes, context.positivity_note):
                pages.text(f"• {note}", 8.5)
            pages.heading("Methods")
            pages.text(context.methods, 8.5)
            pages.flush()
    return path
