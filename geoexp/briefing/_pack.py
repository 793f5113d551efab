"""The printable briefing pack: cover, overview map, and per district a map and a numbered list."""

from __future__ import annotations

import datetime as dt
import textwrap
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import geopandas as gpd
import matplotlib
import numpy as np
import pandas as pd
import shapely
from matplotlib import patheffects
from matplotlib.collections import LineCollection
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Rectangle
from matplotlib.transforms import offset_copy

from geoexp._atomic import atomic_path
from geoexp.briefing._mapdecor import halo_text, scale_bar_and_north_arrow
from geoexp.briefing._plan import (
    ALL_UNITS,
    BriefingPlan,
    DistrictPages,
    PageLayout,
    Paper,
    page_layout,
)
from geoexp.cautions import CAUTION
from geoexp.errors import CRSError, InputError, describe_rows
from geoexp.maps import condition_order, condition_style
from geoexp.trialfile import TrialFile

FIELD_NOTES = (
    "Treat everyone you meet with respect. If asked, say who you are and what you are doing.",
    "Follow local law and your agency's policy at all times. This pack permits nothing "
    "that they do not.",
    "Report problems, safety concerns, and places that differ from the map to the trial lead.",
    "Do not change the list yourself: do not add, drop or swap places, even if another place "
    "looks like a better choice. The places were drawn at random; changing them spoils the "
    "trial.",
    "The numbers on the maps match the numbers in the lists. Within a district, places are "
    "numbered from north to south.",
)

# The shared palette's widths are screen pixels for the web map; at full width on paper the
# street grid would swamp the page, so print scales every width (and with it every dash).
_PRINT_WIDTH = 0.55
_FONT = 7.5  # list text, points
_OVERVIEW_NUMBERS_MAX = 150  # beyond this many treated places, numbers on the overview are clutter
_CHAR_WIDTH = 0.56  # average DejaVu Sans glyph width in ems, for wrapping by character count
_RC = {
    # Type 42 (TrueType) keeps text as text, so unit ids can be searched and copied.
    "pdf.fonttype": 42,
    "font.family": "DejaVu Sans",
    "pdf.compression": 6,
    "axes.linewidth": 0.8,
}


@dataclass(frozen=True)
class _TrialData:
    """What the pack needs from a trial file, read once."""

    trial: TrialFile
    frame: gpd.GeoDataFrame  # every unit: condition, labels, district, street, text columns
    metres_per_unit: float
    district_column: str | None
    instructions_column: str | None
    condition_labels: dict[str, str]


def _column(units: pd.DataFrame, name: str | None, what: str, path: Path) -> str | None:
    if name and name not in units.columns:
        raise InputError(
            f"the design spec names {name!r} as the {what} column, but the unit layer of "
            f"{str(path)!r} has no such column (it has {describe_rows(list(units.columns))})"
        )
    return name or None


def _load(trial: TrialFile | str | Path) -> _TrialData:
    tf = trial if isinstance(trial, TrialFile) else TrialFile.open(trial)
    spec = tf.spec()
    units = tf.units()
    assign = tf.assignment()
    if units.crs is None:
        raise CRSError(f"the unit layer of {str(tf.path)!r} has no CRS; a map needs one")
    if not units.crs.is_projected:
        raise CRSError(
            f"the unit layer of {str(tf.path)!r} is in {units.crs.name}, a geographic CRS; "
            "trial files hold units in a projected CRS, so this file was not written by geoexp"
        )
    mpu_text = tf.meta.get("metres_per_unit")
    metres_per_unit = (
        float(mpu_text) if mpu_text else float(units.crs.axis_info[0].unit_conversion_factor)
    )
    district_col = _column(units, spec.field.district_column, "district", tf.path)
    description_col = _column(units, spec.field.description_column, "description", tf.path)
    instructions_col = _column(units, spec.field.instructions_column, "instructions", tf.path)
    if description_col is None and "description" in units.columns:
        description_col = "description"

    frame = gpd.GeoDataFrame(
        {
            "treated": assign["treated"].astype(bool),
            "condition": assign["condition"].astype(str),
            "condition_label": assign["condition_label"].astype(str),
        },
        geometry=units.geometry.reindex(assign.index),
        crs=units.crs,
    )
    missing = frame.index[frame.geometry.isna()]
    if len(missing):
        raise InputError(
            f"assignment rows of {str(tf.path)!r} without a unit in the unit layer: "
            f"{describe_rows(missing)}"
        )
    if district_col:
        frame["district"] = (
            units[district_col].reindex(frame.index).astype(object).fillna("(no district)")
        ).astype(str)
    else:
        frame["district"] = ALL_UNITS
    frame["description"] = (
        units[description_col].reindex(frame.index).fillna("").astype(str)
        if description_col
        else ""
    )
    if "street" in units.columns:
        frame["street"] = units["street"].reindex(frame.index).fillna("").astype(str)
    else:
        # Descriptions read "Alder St between 3rd Ave and 4th Ave": the street is the first part.
        frame["street"] = frame["description"].str.split(" between ", n=1).str[0]
    frame["instructions"] = (
        units[instructions_col].reindex(frame.index).fillna("").astype(str)
        if instructions_col
        else ""
    )
    labels = (
        frame[["condition", "condition_label"]]
        .drop_duplicates("condition")
        .set_index("condition")["condition_label"]
        .to_dict()
    )
    if not frame["treated"].any():
        raise InputError(f"trial file {str(tf.path)!r} has no treated units: nothing to brief")
    return _TrialData(tf, frame, metres_per_unit, district_col, instructions_col, labels)


def _label_points(geoms: gpd.GeoSeries) -> np.ndarray:
    """Points to put a unit's number on: the middle of a line, a point inside a polygon."""
    values = geoms.values
    out = shapely.point_on_surface(values)
    is_line = np.isin(shapely.get_type_id(values), (1, 5))  # LineString, MultiLineString
    if is_line.any():
        out[is_line] = shapely.line_interpolate_point(values[is_line], 0.5, normalized=True)
    return shapely.get_coordinates(out)


def _plan(data: _TrialData, paper: str, districts: Sequence[str] | None) -> BriefingPlan:
    layout = page_layout(paper)
    frame = data.frame
    treated = frame[frame["treated"]]
    all_names = sorted(frame["district"].unique())
    with_treated = sorted(treated["district"].unique())
    if districts is not None:
        wanted = [str(d) for d in districts]
        unknown = [d for d in wanted if d not in all_names]
        if unknown:
            raise InputError(
                f"districts not found in column {data.district_column or '(none)'!r} of "
                f"{str(data.trial.path)!r}: {describe_rows(unknown)} "
                f"(known: {describe_rows(all_names)})"
            )
        chosen = [d for d in with_treated if d in set(wanted)]
        without = tuple(d for d in dict.fromkeys(wanted) if d not in set(with_treated))
    else:
        chosen = with_treated
        without = tuple(d for d in all_names if d not in set(with_treated))
    if not chosen:
        raise InputError(
            f"none of the chosen districts of {str(data.trial.path)!r} has a treated unit: "
            f"{describe_rows(without)}"
        )
    xy = _label_points(treated.geometry)
    order = pd.DataFrame(
        {"district": treated["district"].to_numpy(), "y": -xy[:, 1], "x": xy[:, 0]},
        index=treated.index,
    )
    # North to south, then west to east: the order a reader scans the map.
    order = order.sort_values(["district", "y", "x"], kind="stable")
    parts = []
    number, page = 1, 3
    for name in chosen:
        ids = tuple(order.index[order["district"].to_numpy() == name])
        n_pages = layout.list_pages(len(ids))
        parts.append(DistrictPages(name, ids, number, page, n_pages))
        number += len(ids)
        page += n_pages
    return BriefingPlan(layout.paper, layout, data.district_column, tuple(parts), without)


def plan_briefing(
    trial: TrialFile | str | Path,
    *,
    paper: Paper = "a4",
    districts: Sequence[str] | None = None,
) -> BriefingPlan:
    """Plan a briefing pack without drawing it: districts, numbering and page count.

    Parameters
    ----------
    trial : TrialFile or path
        A trial file with a drawn assignment.
    paper : {"a4", "letter"}
        Paper size (portrait).
    districts : sequence of str, optional
        Only these districts (values of the spec's district column); default all
        districts that hold treated units.

    Returns
    -------
    BriefingPlan
        Districts in page order, their treated units in numbering order, and
        ``n_pages``, the exact page count of :func:`briefing_pack`.
    """
    return _plan(_load(trial), paper, districts)


# ---- drawing ------------------------------------------------------------------


def _segments(geoms: np.ndarray) -> list[np.ndarray]:
    """Coordinate arrays of the lines to draw: lines as they are, polygons by their boundaries."""
    if len(geoms) == 0:
        return []
    polygonal = np.isin(shapely.get_type_id(geoms), (3, 6))
    geoms = np.where(polygonal, shapely.boundary(geoms), geoms)
    parts = shapely.get_parts(geoms)
    parts = parts[np.isin(shapely.get_type_id(parts), (1, 2))]
    coords, index = shapely.get_coordinates(parts, return_index=True)
    return np.split(coords, np.flatnonzero(np.diff(index)) + 1)


def _draw_units(
    ax, frame: gpd.GeoDataFrame, conditions: Sequence[str] | None = None, *, alpha: float = 1.0
) -> None:
    codes = conditions if conditions is not None else frame["condition"].unique()
    for code in codes:
        geoms = frame.geometry.values[frame["condition"].to_numpy() == code]
        style = line_style(code)
        segs = _segments(np.asarray(geoms))
        if segs and code == "treated":
            # A black casing keeps treated places the darkest lines on a grey printout.
            ax.add_collection(
                LineCollection(
                    segs,
                    colors="black",
                    linewidths=style.linewidth + 1.6,
                    capstyle="butt",
                    zorder=style.zorder,
                    alpha=alpha,
                )
            )
        if segs:
            ax.add_collection(
                LineCollection(
                    segs,
                    colors=style.color,
                    linewidths=style.linewidth,
                    linestyles=[style.linestyle],
                    capstyle="butt",
                    zorder=style.zorder,
                    alpha=alpha,
                )
            )
        points = shapely.get_coordinates(np.asarray(geoms)[shapely.get_type_id(geoms) == 0])
        if len(points):
            ax.scatter(
                points[:, 0],
                points[:, 1],
                s=style.linewidth * 6,
                c=style.color,
                zorder=7,
                alpha=alpha,
            )


def _draw_outlines(ax: matplotlib.axes.Axes, outlines: gpd.GeoSeries) -> None:
    """District outlines: dark dashed lines over the units."""
    ax.add_collection(
        LineCollection(
            _segments(outlines.values),
            colors="0.15",
            linewidths=1.0,
            linestyles=[(0, (6, 3))],
            zorder=3,
        )
    )


def _fit_extent(bounds, aspect: float, min_span: float, pad: float) -> tuple[float, ...]:
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


def _map_axes(
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


def _district_outlines(frame: gpd.GeoDataFrame, metres_per_unit: float) -> gpd.GeoSeries:
    """An approximate outline of each district, drawn around its units.

    Trial files carry units, not district polygons, so the outline is the
    concave hull (shapely) of each district's units, widened by 25 m so it
    does not run along the streets themselves.
    """
    merged = frame.geometry.groupby(frame["district"].to_numpy()).agg(
        lambda s: shapely.union_all(s.values)
    )
    hulls = shapely.concave_hull(merged.to_numpy(), ratio=0.25)
    hulls = shapely.buffer(hulls, 25.0 / metres_per_unit)
    return gpd.GeoSeries(hulls, index=merged.index, crs=frame.crs)


def _legend_handles(
    frame: gpd.GeoDataFrame, labels: dict[str, str], codes: Sequence[str]
) -> list[Line2D]:
    handles = []
    for code in codes:
        style = line_style(code)
        casing = (
            [
                patheffects.Stroke(linewidth=style.linewidth + 1.6, foreground="black"),
                patheffects.Normal(),
            ]
            if code == "treated"
            else None
        )
        handles.append(
            Line2D(
                [],
                [],
                color=style.color,
                linewidth=style.linewidth,
                linestyle=style.linestyle,
                label=labels.get(code, code),
                path_effects=casing,
            )
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
    handles.append(
        Line2D(
            [], [], color="0.15", linewidth=1.0, linestyle=(0, (6, 3)), label="district (approx.)"
        )
    )
    return handles


@dataclass(frozen=True)
class _PrintStyle:
    color: str
    linewidth: float
    linestyle: str | tuple[float, tuple[float, ...]]
    zorder: float


def line_style(code: str) -> _PrintStyle:
    """The project's style of a condition (:func:`geoexp.maps.condition_style`), sized for paper."""
    look = condition_style(code)
    if code == "treated":
        zorder = 6.0
    elif code.startswith("spillover_"):
        zorder = 5.0 - 1.0 / (1 + int(code.rsplit("_", 1)[1]))
    else:
        zorder = 2.0
    return _PrintStyle(look.colour, look.width * _PRINT_WIDTH, look.mpl_linestyle, zorder)


class _Pages:
    """Shared page furniture: header and footer with 'page i of n'."""

    def __init__(self, data: _TrialData, plan: BriefingPlan, printed_at: str) -> None:
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
            f"drawn {meta.get('drawn_at', '?')} · printed {self.printed_at}"
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


def _wrap(text: str, width_in: float, lines: int, fontsize: float = _FONT) -> str:
    chars = max(4, int(width_in * 72 / (_CHAR_WIDTH * fontsize)))
    wrapped = textwrap.wrap(text, chars, max_lines=lines, placeholder=" …")
    return "\n".join(wrapped)


def _cover(pages: _Pages) -> Figure:
    data, plan, lay = pages.data, pages.plan, pages.layout
    meta = data.trial.meta
    fig = pages.new("Field briefing pack", meta.get("name", ""))
    inch = fig.dpi_scale_trans
    x = lay.margin
    y = pages.body_top - 0.1
    info = [
        ("Design", f"{meta.get('spec_hash', '')[:12]} (full hash {meta.get('spec_hash', '')})"),
        (
            "Assignment drawn at",
            f"{meta.get('drawn_at', '?')} (draw {meta.get('draw_number', '?')})",
        ),
        ("Pack printed at", pages.printed_at),
        ("Seed", meta.get("seed", "?")),
        ("This pack", f"{plan.n_pages} pages, {plan.paper.upper()}"),
    ]
    for key, value in info:
        fig.text(x, y, key, transform=inch, fontsize=8.5, fontweight="bold")
        fig.text(x + 1.6, y, value, transform=inch, fontsize=7.5 if key == "Design" else 8.5)
        y -= 0.2

    y -= 0.15
    fig.text(x, y, "Units by exposure condition", transform=inch, fontsize=10, fontweight="bold")
    y -= 0.24
    frame = data.frame
    counts = frame.groupby("condition").size()
    for code in condition_order(counts.index):
        fig.text(x + 0.1, y, data.condition_labels.get(code, code), transform=inch, fontsize=8.5)
        fig.text(x + 2.6, y, f"{counts[code]:,}", transform=inch, fontsize=8.5, ha="right")
        y -= 0.18
    fig.text(x + 0.1, y, "all units", transform=inch, fontsize=8.5, fontweight="bold")
    fig.text(x + 2.6, y, f"{len(frame):,}", transform=inch, fontsize=8.5, ha="right")
    y -= 0.32

    fig.text(x, y, "Districts in this pack", transform=inch, fontsize=10, fontweight="bold")
    y -= 0.24
    for col, head in ((0.1, "district"), (2.9, "treated places"), (4.3, "numbers"), (5.4, "pages")):
        fig.text(x + col, y, head, transform=inch, fontsize=8, color="0.3")
    y -= 0.18
    caution_top = lay.margin + lay.footer + 2.55
    room = max(1, int((y - caution_top) / 0.17))
    shown = plan.districts if len(plan.districts) <= room else plan.districts[: room - 1]
    for d in shown:
        last_number = d.first_number + len(d.unit_ids) - 1
        last_page = d.first_page + d.n_pages - 1
        cells = (
            (0.1, d.name),
            (2.9, str(len(d.unit_ids))),
            (4.3, f"{d.first_number}-{last_number}"),
            (5.4, f"{d.first_page}" + (f"-{last_page}" if last_page > d.first_page else "")),
        )
        for col, text in cells:
            fig.text(x + col, y, text, transform=inch, fontsize=8.5)
        y -= 0.17
    if len(shown) < len(plan.districts):
        fig.text(
            x + 0.1,
            y,
            f"... and {len(plan.districts) - len(shown)} more districts (see the page headers)",
            transform=inch,
            fontsize=8.5,
        )
        y -= 0.17
    if plan.districts_without_treated:
        note = "No treated places in: " + ", ".join(plan.districts_without_treated)
        fig.text(
            x + 0.1,
            y - 0.05,
            _wrap(note, lay.width - 2 * x, 2, 8),
            transform=inch,
            fontsize=8,
            va="top",
        )

    # The cautions sit in a framed box at the foot of the cover, where they cannot be missed.
    width = lay.width - 2 * lay.margin
    bottom = lay.margin + lay.footer
    fig.add_artist(
        Rectangle(
            (x, bottom),
            width,
            caution_top - bottom - 0.05,
            transform=inch,
            facecolor="0.95",
            edgecolor="black",
            linewidth=1.0,
        )
    )
    y = caution_top - 0.3
    fig.text(x + 0.15, y, "Before you go out", transform=inch, fontsize=10, fontweight="bold")
    y -= 0.12
    wrap_chars = int((width - 0.5) * 72 / (_CHAR_WIDTH * 8))
    for note in FIELD_NOTES:
        text = textwrap.fill(note, wrap_chars)
        fig.text(x + 0.15, y, "•", transform=inch, fontsize=8, va="top")
        fig.text(x + 0.3, y, text, transform=inch, fontsize=8, va="top", linespacing=1.25)
        y -= 0.155 * (text.count("\n") + 1) + 0.05
    fig.text(
        x + 0.15,
        y - 0.03,
        textwrap.fill(CAUTION, int((width - 0.3) * 72 / (_CHAR_WIDTH * 7.5))),
        transform=inch,
        fontsize=7.5,
        va="top",
        style="italic",
        linespacing=1.25,
    )
    return fig


def _overview(pages: _Pages, outlines: gpd.GeoSeries) -> Figure:
    data, plan, lay = pages.data, pages.plan, pages.layout
    frame = data.frame
    fig = pages.new(
        "Overview: all districts",
        f"{plan.n_treated} treated places in {len(plan.districts)} districts; district pages "
        "follow in the order listed on the cover",
    )
    width = lay.width - 2 * lay.margin
    height = pages.body_top - (lay.margin + lay.footer) - lay.legend_strip
    bottom = lay.margin + lay.footer + lay.legend_strip
    extent = _fit_extent(
        frame.total_bounds, width / height, 0.0, 0.03 * np.ptp(frame.total_bounds[[0, 2]])
    )
    ax = _map_axes(fig, (lay.margin, bottom, width, height), extent)
    context = frame[~frame["treated"]]
    ax.add_collection(
        LineCollection(_segments(context.geometry.values), colors="0.6", linewidths=0.4, zorder=2)
    )
    _draw_units(ax, frame[frame["treated"]], ["treated"])
    xy = _label_points(frame.geometry[frame["treated"]])
    ax.scatter(
        xy[:, 0], xy[:, 1], s=14, facecolor="white", edgecolor="black", linewidth=0.8, zorder=8
    )
    if plan.n_treated <= _OVERVIEW_NUMBERS_MAX:
        number_of = {
            uid: n for d in plan.districts for uid, n in zip(d.unit_ids, d.numbers, strict=True)
        }
        shifted = offset_copy(ax.transData, fig=fig, x=3, y=3, units="points")
        treated_ids = frame.index[frame["treated"]]
        for uid, (px, py) in zip(treated_ids, xy, strict=True):
            if uid in number_of:
                # Above the district names, so that no number is hidden by a name.
                halo_text(
                    ax, px, py, str(number_of[uid]), transform=shifted, fontsize=6.5, zorder=12
                )
    _draw_outlines(ax, outlines)
    first_page = {d.name: d.first_page for d in plan.districts}
    label_at = shapely.get_coordinates(shapely.point_on_surface(outlines.values))
    for (name, _), (lx, ly) in zip(outlines.items(), label_at, strict=True):
        page = first_page.get(name)
        text = f"{name}\n(page {page})" if page else f"{name}\n(no treated places)"
        halo_text(
            ax,
            lx,
            ly,
            text,
            ha="center",
            va="center",
            fontsize=9,
            fontweight="bold",
            zorder=9,
            halo=3.5,
        )
    scale_bar_and_north_arrow(
        ax, crs=frame.crs, metres_per_unit=data.metres_per_unit, bounds=extent
    )
    handles = [
        _legend_handles(frame, data.condition_labels, ["treated"])[0],
        Line2D([], [], color="0.6", linewidth=0.4, label="other units"),
        *_legend_handles(frame, data.condition_labels, [])[-2:],
    ]
    fig.legend(
        handles=handles,
        loc="upper left",
        bbox_to_anchor=(lay.margin, bottom - 0.05),
        bbox_transform=fig.dpi_scale_trans,
        ncol=4,
        frameon=False,
        fontsize=7.5,
        handlelength=3.2,
    )
    return fig


def _street_labels(
    ax, frame: gpd.GeoDataFrame, treated: gpd.GeoDataFrame, extent, limit: int = 20
) -> None:
    """Name the streets near the treated places, once each.

    Each street is named on its piece nearest to a treated place that does not
    touch one, so the name sits beside the numbers rather than on top of them.
    """
    w, h = extent[2] - extent[0], extent[3] - extent[1]
    inner = shapely.box(
        extent[0] + 0.06 * w, extent[1] + 0.08 * h, extent[2] - 0.06 * w, extent[3] - 0.06 * h
    )
    inside = frame.iloc[frame.sindex.query(inner, predicate="contains")]
    inside = inside[(inside["street"] != "") & inside.geom_type.isin(["LineString"])]
    if inside.empty:
        return
    near, distance = treated.sindex.nearest(inside.geometry, return_distance=True)
    gap = np.full(len(inside), np.inf)
    np.minimum.at(gap, near[0], distance)
    pick = (
        inside.assign(_gap=gap)
        .loc[lambda f: f["_gap"] > 0]
        .sort_values("_gap", kind="stable")
        .drop_duplicates("street")
        .head(limit)
    )
    if pick.empty:
        return
    starts = shapely.get_point(pick.geometry.values, 0)
    ends = shapely.get_point(pick.geometry.values, -1)
    dx = shapely.get_x(ends) - shapely.get_x(starts)
    dy = shapely.get_y(ends) - shapely.get_y(starts)
    angle = np.degrees(np.arctan2(dy, dx))
    # Keep the text upright: turn labels that would read downwards by half a turn.
    angle = np.where(angle > 90, angle - 180, np.where(angle < -90, angle + 180, angle))
    mid = _label_points(pick.geometry)
    for name, (mx, my), rot in zip(pick["street"], mid, angle, strict=True):
        halo_text(
            ax,
            mx,
            my,
            name,
            rotation=rot,
            rotation_mode="anchor",
            ha="center",
            va="center",
            fontsize=6,
            style="italic",
            color="0.15",
            zorder=9,
        )


def _table_columns(lay: PageLayout, with_instructions: bool) -> list[tuple[str, float, str]]:
    width = lay.width - 2 * lay.margin
    fixed = [("#", 0.35, "number"), ("Unit id", 1.1, "id"), ("Condition", 1.0, "text")]
    rest = width - sum(c[1] for c in fixed)
    if with_instructions:
        text_cols = [
            ("Street (description)", rest * 0.45, "text"),
            ("Instructions", rest * 0.55, "text"),
        ]
    else:
        text_cols = [("Street (description)", rest, "text")]
    return fixed[:2] + text_cols[:1] + fixed[2:] + text_cols[1:]


def _draw_table(
    fig: Figure, lay: PageLayout, top: float, rows: list[tuple[str, ...]], columns
) -> None:
    """Draw a list with fixed-height rows; ``top`` is inches from the page bottom.

    Rows have one height so that the page count follows from the number of rows
    alone; text longer than two lines is cut short, and a note says where the
    full text is.
    """
    cut_short = False
    inch = fig.dpi_scale_trans
    x0 = lay.margin
    width = lay.width - 2 * lay.margin
    fig.add_artist(
        Rectangle(
            (x0, top - lay.table_header), width, lay.table_header, transform=inch, facecolor="0.2"
        )
    )
    x = x0
    for title, col_width, _ in columns:
        fig.text(
            x + 0.05,
            top - lay.table_header / 2,
            title,
            transform=inch,
            fontsize=8,
            fontweight="bold",
            color="white",
            va="center",
        )
        x += col_width
    y = top - lay.table_header
    for i, row in enumerate(rows):
        if i % 2 == 1:
            fig.add_artist(
                Rectangle(
                    (x0, y - lay.row_height), width, lay.row_height, transform=inch, facecolor="0.9"
                )
            )
        x = x0
        for value, (_, col_width, kind) in zip(row, columns, strict=True):
            size = _FONT
            if kind == "id":
                # Ids are never wrapped or cut (a reader must find each one whole): long ones shrink.
                need = len(value) * _CHAR_WIDTH * size / 72
                size = max(3.5, size * min(1.0, (col_width - 0.1) / max(need, 1e-9)))
                text = value
            elif kind == "number":
                text = value
                size = 8.5
            else:
                text = _wrap(value, col_width - 0.1, 2)
                cut_short = cut_short or text.endswith("…")
            fig.text(
                x + 0.05,
                y - lay.row_height / 2,
                text,
                transform=inch,
                fontsize=size,
                fontweight="bold" if kind == "number" else "normal",
                va="center",
                linespacing=1.1,
            )
            x += col_width
        y -= lay.row_height
    fig.add_artist(Line2D([x0, x0 + width], [y, y], transform=inch, color="0.2", linewidth=0.6))
    if cut_short:
        fig.text(
            x0,
            y - 0.1,
            "… text cut short here; the full text is in the field list (geoexp export).",
            transform=inch,
            fontsize=6.5,
            va="top",
            style="italic",
        )


def _district_pages(
    pages: _Pages, district: DistrictPages, outlines: gpd.GeoSeries
) -> list[Figure]:
    data, lay = pages.data, pages.layout
    frame = data.frame
    ids = list(district.unit_ids)
    treated = frame.loc[ids]
    numbers = list(district.numbers)
    rows = [
        (str(n), str(uid), desc, label, *((instr,) if data.instructions_column else ()))
        for n, uid, desc, label, instr in zip(
            numbers,
            ids,
            treated["description"],
            treated["condition_label"],
            treated["instructions"],
            strict=True,
        )
    ]
    columns = _table_columns(lay, data.instructions_column is not None)

    count = (
        f"{len(ids)} treated place{'s' if len(ids) != 1 else ''}, numbers {numbers[0]}-{numbers[-1]}"
        + ("; other districts are shown faded" if district.name != ALL_UNITS else "")
    )
    title = district.name if district.name == ALL_UNITS else f"District: {district.name}"
    fig = pages.new(title, count)
    width = lay.width - 2 * lay.margin
    map_bottom = pages.body_top - lay.map_height
    xy = _label_points(treated.geometry)
    bounds = (xy[:, 0].min(), xy[:, 1].min(), xy[:, 0].max(), xy[:, 1].max())
    tb = treated.total_bounds
    bounds = (
        min(bounds[0], tb[0]),
        min(bounds[1], tb[1]),
        max(bounds[2], tb[2]),
        max(bounds[3], tb[3]),
    )
    span = max(bounds[2] - bounds[0], bounds[3] - bounds[1])
    extent = _fit_extent(
        bounds,
        width / lay.map_height,
        500.0 / data.metres_per_unit,
        max(150.0 / data.metres_per_unit, 0.08 * span),
    )
    ax = _map_axes(fig, (lay.margin, map_bottom, width, lay.map_height), extent)
    view = frame.iloc[frame.sindex.query(shapely.box(*extent), predicate="intersects")]
    own = view["district"].to_numpy() == district.name
    # Places of other districts stay on the map for orientation, faded, so that a team
    # does not take another district's treated place for one of its own.
    _draw_units(ax, view[~own], condition_order(view["condition"].unique()), alpha=0.3)
    _draw_units(ax, view[own], condition_order(view["condition"].unique()))
    _draw_outlines(ax, outlines)
    _street_labels(ax, view, treated, extent)
    ax.scatter(
        xy[:, 0], xy[:, 1], s=22, facecolor="white", edgecolor="black", linewidth=1.0, zorder=10
    )
    shifted = offset_copy(ax.transData, fig=fig, x=4.5, y=4.5, units="points")
    for n, (px, py) in zip(numbers, xy, strict=True):
        halo_text(
            ax,
            px,
            py,
            str(n),
            transform=shifted,
            fontsize=10,
            fontweight="bold",
            zorder=11,
            halo=3.5,
        )
    scale_bar_and_north_arrow(
        ax, crs=frame.crs, metres_per_unit=data.metres_per_unit, bounds=extent
    )
    codes = condition_order(view["condition"].unique())
    fig.legend(
        handles=_legend_handles(frame, data.condition_labels, codes),
        loc="upper left",
        bbox_to_anchor=(lay.margin, map_bottom - 0.03),
        bbox_transform=fig.dpi_scale_trans,
        ncol=3,
        frameon=False,
        fontsize=7,
        handlelength=3.2,
        columnspacing=1.2,
        borderaxespad=0.0,
    )
    table_top = map_bottom - lay.legend_strip
    first, rest = rows[: lay.rows_first], rows[lay.rows_first :]
    _draw_table(fig, lay, table_top, first, columns)
    figures = [fig]
    for k in range(1, district.n_pages):
        chunk = rest[(k - 1) * lay.rows_continued : k * lay.rows_continued]
        fig = pages.new(f"{title} (list continued, {k + 1} of {district.n_pages})", count)
        _draw_table(fig, lay, pages.body_top, chunk, columns)
        figures.append(fig)
    return figures


def briefing_pack(
    trial: TrialFile | str | Path,
    path: str | Path,
    *,
    paper: Paper = "a4",
    districts: Sequence[str] | None = None,
) -> Path:
    """Write a printable briefing pack (PDF) for field teams.

    The pack holds a cover (trial name, when the assignment was drawn and when
    the pack was printed, the design hash, counts per exposure condition, a
    table of districts and the cautions for field staff), an overview map of
    all districts, and for each district a map of its treated places,
    numbered, with street names, a scale bar in metres, a north arrow and a
    legend, followed by the numbered list (unit id, street description,
    condition and the spec's instructions column, if any), continued on extra
    pages when it is long. Conditions differ by line width and dash as well as
    by colour (Okabe & Ito, 2008), so the pack reads in black and white. Text
    is embedded as TrueType text, so every unit id can be searched.

    Parameters
    ----------
    trial : TrialFile or path
        A trial file with a drawn assignment.
    path : path
        PDF file to write (atomically: a failed run leaves no partial file).
    paper : {"a4", "letter"}
        Paper size, portrait.
    districts : sequence of str, optional
        Only these districts (values of the spec's ``field.district_column``);
        default every district with treated units. Without a district column
        the pack has one district, "All units".

    Returns
    -------
    pathlib.Path
        The written file. Its page count is ``plan_briefing(...).n_pages``.

    Raises
    ------
    geoexp.errors.InputError
        Unknown paper or district, a column named in the spec missing from the
        unit layer, or no treated units.
    geoexp.errors.CRSError
        Units without a projected CRS.
    """
    from matplotlib.backends.backend_pdf import PdfPages

    data = _load(trial)
    plan = _plan(data, paper, districts)
    printed_at = dt.datetime.now(dt.UTC).replace(microsecond=0).isoformat()
    outlines = _district_outlines(data.frame, data.metres_per_unit)
    pages = _Pages(data, plan, printed_at)
    path = Path(path)
    metadata = {
        "Title": f"Field briefing pack: {data.trial.meta.get('name', '')}",
        "Subject": f"design {data.trial.meta.get('spec_hash', '')}",
        "Creator": "geoexp",
    }
    with matplotlib.rc_context(_RC), atomic_path(path) as tmp:
        with PdfPages(tmp, metadata=metadata) as pdf:
            pdf.savefig(_cover(pages))
            pdf.savefig(_overview(pages, outlines))
            for district in plan.districts:
                for fig in _district_pages(pages, district, outlines):
                    pdf.savefig(fig)
        if pages.page != plan.n_pages:  # the plan is the contract printed on every page
            raise AssertionError(f"drew {pages.page} pages, planned {plan.n_pages}")
    return path
