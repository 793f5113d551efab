"""Page sizes, page layout and the page plan of a briefing pack.

The plan is computed from the data before anything is drawn, so the number of
pages is known in advance and printed on every page ("page 3 of 19").
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

from geoexp._tables import plural
from geoexp.errors import InputError

Paper = Literal["a4", "letter"]

# ISO 216 A4 is 210 x 297 mm; US Letter is 8.5 x 11 in.
PAPER_INCHES: dict[str, tuple[float, float]] = {
    "a4": (210 / 25.4, 297 / 25.4),
    "letter": (8.5, 11.0),
}

ALL_UNITS = "All units"


@dataclass(frozen=True)
class PageLayout:
    """Fixed measures (inches) of a portrait page; list rows have one fixed height."""

    paper: str
    width: float
    height: float
    margin: float = 0.55
    header: float = 0.7
    footer: float = 0.4
    legend_strip: float = 0.5
    table_header: float = 0.3
    row_height: float = 0.3
    map_share: float = 0.52
    log_intro: float = 0.45
    log_row_height: float = 0.34

    @property
    def usable_height(self) -> float:
        """Height between the header and the footer."""
        return self.height - 2 * self.margin - self.header - self.footer

    @property
    def map_height(self) -> float:
        """Height of the map on a district's first page."""
        return round(self.usable_height * self.map_share, 2)

    @property
    def rows_first(self) -> int:
        """List rows that fit under the map on a district's first page."""
        room = self.usable_height - self.map_height - self.legend_strip - self.table_header
        return math.floor(room / self.row_height)

    @property
    def rows_continued(self) -> int:
        """List rows on a continuation page (no map)."""
        return math.floor((self.usable_height - self.table_header) / self.row_height)

    @property
    def rows_log(self) -> int:
        """Rows on a visit-log sheet."""
        room = self.usable_height - self.log_intro - self.table_header
        return math.floor(room / self.log_row_height)

    def log_pages(self, n_places: int) -> int:
        """Visit-log sheets a district needs: one row per place, at least one sheet."""
        return max(1, math.ceil(n_places / self.rows_log))

    def list_pages(self, n_rows: int) -> int:
        """Pages a district needs: its map page plus continuation pages for the rest of its list."""
        rest = max(0, n_rows - self.rows_first)
        return 1 + math.ceil(rest / self.rows_continued)


def page_layout(paper: str) -> PageLayout:
    """Return the layout of a paper size (``"a4"`` or ``"letter"``).

    Parameters
    ----------
    paper : {"a4", "letter"}
        The paper size, in any letter case.

    Returns
    -------
    PageLayout
        The layout, with the page's width and height in inches.

    Raises
    ------
    geoexp.errors.InputError
        ``paper`` is not a known size.
    """
    key = str(paper).lower()
    if key not in PAPER_INCHES:
        raise InputError(f"paper must be one of {sorted(PAPER_INCHES)}, got {paper!r}")
    width, height = PAPER_INCHES[key]
    return PageLayout(key, width, height)


@dataclass(frozen=True)
class DistrictPages:
    """One district's part of the pack: its treated units in numbering order and its pages.

    Its pages are a map page with the start of its list, the list's continuation
    pages, then its visit-log sheets.
    """

    name: str
    unit_ids: tuple
    first_number: int
    first_page: int
    n_list_pages: int
    n_log_pages: int = 1

    @property
    def n_pages(self) -> int:
        """All pages of the district: map and list pages, then visit-log sheets."""
        return self.n_list_pages + self.n_log_pages

    @property
    def numbers(self) -> range:
        """The map numbers of this district's treated units."""
        return range(self.first_number, self.first_number + len(self.unit_ids))

    @property
    def pages(self) -> range:
        """Page numbers (1-based) of this district."""
        return range(self.first_page, self.first_page + self.n_pages)


@dataclass(frozen=True)
class BriefingPlan:
    """What a briefing pack will hold, page by page.

    Pages: 1 cover, 2 overview map, then for each district a map page with the
    start of its list, as many continuation pages as its list needs, and its
    visit-log sheets (one row per place, to record each visit).
    """

    paper: str
    layout: PageLayout
    district_column: str | None
    districts: tuple[DistrictPages, ...]
    districts_without_treated: tuple[str, ...] = ()

    @property
    def n_pages(self) -> int:
        """Total number of pages."""
        return 2 + sum(d.n_pages for d in self.districts)

    @property
    def n_treated(self) -> int:
        """Number of treated units in the pack."""
        return sum(len(d.unit_ids) for d in self.districts)

    def __str__(self) -> str:
        lines = [
            f"Briefing pack ({self.paper.upper()}): {plural(self.n_pages, 'page')}, "
            f"{plural(self.n_treated, 'treated unit')} in {plural(len(self.districts), 'district')}"
        ]
        for d in self.districts:
            last = d.first_page + d.n_pages - 1
            pages = f"page {d.first_page}" if d.n_pages == 1 else f"pages {d.first_page}-{last}"
            lines.append(f"  {d.name}: {plural(len(d.unit_ids), 'treated unit')}, {pages}")
        return "\n".join(lines)
