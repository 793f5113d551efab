"""Page chrome of the briefing pack: page furniture, map frames, wrapping, legends."""

from __future__ import annotations

import datetime as dt
import textwrap
from collections.abc import Sequence

import matplotlib
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from geoexp.briefing._load import TrialData
from geoexp.briefing._plan import BriefingPlan
from geoexp.maps import condition_handle, district_handle

FONT = 7.5  # list text, points
CHAR_WIDTH = 0.56  # average DejaVu Sans glyph width in ems, for wrapping by character count


CONTEXT_GREY = "0.62"  # streets that are not treated places: light, but darker than paper


def human_time(stamp: str | dt.datetime | None) -> str:
    """A timestamp as people read it: local date and time with the zone's name.

    ``"2026-12-03T00:35:10+00:00"`` prints as ``"3 December 2026, 00:35 UTC"`` on a
    machine whose clock is set to UTC. Text that is not a timestamp is returned as is.
    """
    if stamp is None or stamp == "":
        return "?"
    if isinstance(stamp, dt.datetime):
        when = stamp
    else:
        try:
            when = dt.datetime.fromisoformat(str(stamp))
        except ValueError:
            return str(stamp)
    if when.tzinfo is None:
        when = when.replace(tzinfo=dt.UTC)  # geoexp stores times in UTC
    local = when.astimezone()
    return f"{local.day} {local:%B %Y, %H:%M} {local.tzname() or ''}".strip()


def fit_extent(bounds, aspect: float, min_span: float, pad: float) -> tuple[float, ...]:
    """Grow ``bounds`` by ``pad`` (and to ``min_span``) and to the width/height ratio ``aspect``."""
    x0, y0, x1, y1 = bounds
    cx, cy = (x0 + x1) / 2, (y0 + y1) / 2
    w = max(x1 - x0 + 2 * pad, min_span)
    h = max(y1 - y0 + 2 * pad, min_span)
    if w / h < aspect:
        w = h * aspect
    else:
        h = w / aspect
    return cx - w / 2, cy - h / 2, cx + w / 2, cy + h / 2


def map_axes(
    fig: Figure, rect_in: tuple[float, float, float, float], extent
) -> matplotlib.axes.Axes:
    left, bottom, width, height = rect_in
    fw, fh = fig.get_figwidth(), fig.get_figheight()
    ax = fig.add_axes((left / fw, bottom / fh, width / fw, height / fh))
    ax.set_xlim(extent[0], extent[2])
    ax.set_ylim(extent[1], extent[3])
    ax.set_aspect("equal", adjustable="box")
    ax.set_xticks([])
    ax.set_yticks([])
    ax.set_facecolor("white")
    return ax


def legend_handles(
    labels: dict[str, str], codes: Sequence[str], district_label: str = "district (approx.)"
) -> list[Line2D]:
    """Legend handles: the treated place's line, other streets, the numbered place, districts.

    Field maps show where to go, not the trial's comparison groups: every place
    that is not treated is drawn alike, as a plain grey street.
    """
    handles = [condition_handle(code, labels.get(code, code)) for code in codes]
    handles.append(
        Line2D([], [], color=CONTEXT_GREY, linewidth=0.6, label="other streets (not visited)")
    )
    handles.append(
        Line2D(
            [],
            [],
            color="black",
            marker="o",
            markerfacecolor="white",
            linestyle="none",
            markersize=5,
            label="numbered treated place",
        )
    )
    handles.append(district_handle(district_label))
    return handles


class Pages:
    """Shared page furniture: header and footer with 'page i of n'."""

    def __init__(self, data: TrialData, plan: BriefingPlan, printed_at: str) -> None:
        self.data = data
        self.plan = plan
        self.layout = plan.layout
        self.printed_at = printed_at
        self.page = 0

    def new(self, title: str, subtitle: str = "") -> Figure:
        lay = self.layout
        self.page += 1
        fig = Figure(figsize=(lay.width, lay.height))
        fig.patch.set_facecolor("white")
        top = lay.height - lay.margin
        inch = fig.dpi_scale_trans
        fig.text(lay.margin, top - 0.22, title, transform=inch, fontsize=14, fontweight="bold")
        if subtitle:
            fig.text(lay.margin, top - 0.5, subtitle, transform=inch, fontsize=8.5, color="0.2")
        meta = self.data.trial.meta
        footer = (
            f"{meta.get('name', '')} · design {meta.get('spec_hash', '')[:12]} · "
            f"drawn {human_time(meta.get('drawn_at'))} · printed {self.printed_at}"
        )
        fig.text(lay.margin, lay.margin + 0.05, footer, transform=inch, fontsize=6.5, color="0.25")
        fig.text(
            lay.width - lay.margin,
            lay.margin + 0.05,
            f"page {self.page} of {self.plan.n_pages}",
            transform=inch,
            fontsize=8,
            ha="right",
        )
        fig.add_artist(
            Line2D(
                [lay.margin, lay.width - lay.margin],
                [lay.margin + 0.25, lay.margin + 0.25],
                transform=inch,
                color="0.3",
                linewidth=0.5,
            )
        )
        return fig

    @property
    def body_top(self) -> float:
        """Inches from the bottom of the page to the top of the body (below the header)."""
        return self.layout.height - self.layout.margin - self.layout.header


def wrap(text: str, width_in: float, lines: int, fontsize: float = FONT) -> str:
    chars = max(4, int(width_in * 72 / (CHAR_WIDTH * fontsize)))
    wrapped = textwrap.wrap(text, chars, max_lines=lines, placeholder=" …")
    return "\n".join(wrapped)
