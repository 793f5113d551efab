"""The briefing pack's visit-log sheets: one per district, for teams to record their visits."""

from __future__ import annotations

from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Rectangle

from geoexp.briefing._chrome import (
    Pages,
    wrap,
)
from geoexp.briefing._plan import DistrictPages

LOG_COLUMNS = (  # title, share of the page's width
    ("#", 0.06),
    ("Street", 0.26),
    ("Date", 0.11),
    ("Time in", 0.09),
    ("Time out", 0.09),
    ("Officer", 0.14),
    ("Notes", 0.25),
)


def visit_log_pages(pages: Pages, district: DistrictPages, title: str) -> list[Figure]:
    """The district's visit-log sheets: one row per place for the team to fill in by hand."""
    data, lay = pages.data, pages.layout
    streets = data.frame.loc[list(district.unit_ids), "street"].to_numpy()
    rows = [(str(n), str(st)) for n, st in zip(district.numbers, streets, strict=True)]
    width = lay.width - 2 * lay.margin
    figures = []
    for k in range(district.n_log_pages):
        chunk = rows[k * lay.rows_log : (k + 1) * lay.rows_log]
        more = f" ({k + 1} of {district.n_log_pages})" if district.n_log_pages > 1 else ""
        fig = pages.new(
            f"Visit log: {title}{more}",
            "Write one line per visit; copy this sheet for more. Hand it to the trial lead "
            "at the end of each period.",
        )
        inch = fig.dpi_scale_trans
        top = pages.body_top - lay.log_intro
        fig.text(
            lay.margin,
            top + 0.12,
            "Team: ____________________   Period: ______________   Sheet ___ of ___",
            transform=inch,
            fontsize=9,
        )
        fig.add_artist(
            Rectangle(
                (lay.margin, top - lay.table_header),
                width,
                lay.table_header,
                transform=inch,
                facecolor="0.2",
            )
        )
        x = lay.margin
        edges = [x]
        for head, share in LOG_COLUMNS:
            fig.text(
                x + 0.05,
                top - lay.table_header / 2,
                head,
                transform=inch,
                fontsize=8,
                fontweight="bold",
                color="white",
                va="center",
            )
            x += share * width
            edges.append(x)
        y = top - lay.table_header
        # Blank rows fill the sheet, for repeat visits.
        for i in range(lay.rows_log):
            bottom = y - lay.log_row_height
            fig.add_artist(
                Line2D(
                    [lay.margin, lay.margin + width],
                    [bottom, bottom],
                    transform=inch,
                    color="0.35",
                    linewidth=0.5,
                )
            )
            if i < len(chunk):
                number, street = chunk[i]
                fig.text(
                    edges[0] + 0.05,
                    y - lay.log_row_height / 2,
                    number,
                    transform=inch,
                    fontsize=9,
                    fontweight="bold",
                    va="center",
                )
                fig.text(
                    edges[1] + 0.05,
                    y - lay.log_row_height / 2,
                    wrap(street, edges[2] - edges[1] - 0.1, 1, 8),
                    transform=inch,
                    fontsize=8,
                    va="center",
                )
            y = bottom
        for edge in edges:
            fig.add_artist(
                Line2D(
                    [edge, edge],
                    [top - lay.table_header, y],
                    transform=inch,
                    color="0.35",
                    linewidth=0.5,
                )
            )
        figures.append(fig)
    return figures
