"""The briefing pack's page kinds: cover, overview map, and each district's map and list."""

from __future__ import annotations

import textwrap

import geopandas as gpd
import numpy as np
import shapely
from matplotlib.collections import LineCollection
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Rectangle
from matplotlib.transforms import offset_copy

from geoexp.briefing._chrome import (
    CHAR_WIDTH,
    FONT,
    Pages,
    fit_extent,
    legend_handles,
    map_axes,
    wrap,
)
from geoexp.briefing._load import label_points
from geoexp.briefing._plan import ALL_UNITS, DistrictPages, PageLayout
from geoexp.cautions import CAUTION
from geoexp.maps import (
    condition_order,
    draw_district_outlines,
    draw_units_by_condition,
    halo_text,
    line_segments,
    scale_bar_and_north_arrow,
)

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

_OVERVIEW_NUMBERS_MAX = 150  # beyond this many treated places, numbers on the overview are clutter


def cover(pages: Pages) -> Figure:
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
        *([("Coordinates", meta["coordinates"])] if meta.get("coordinates") else []),
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
            wrap(note, lay.width - 2 * x, 2, 8),
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
    wrap_chars = int((width - 0.5) * 72 / (CHAR_WIDTH * 8))
    for note in FIELD_NOTES:
        text = textwrap.fill(note, wrap_chars)
        fig.text(x + 0.15, y, "•", transform=inch, fontsize=8, va="top")
        fig.text(x + 0.3, y, text, transform=inch, fontsize=8, va="top", linespacing=1.25)
        y -= 0.155 * (text.count("\n") + 1) + 0.05
    fig.text(
        x + 0.15,
        y - 0.03,
        textwrap.fill(CAUTION, int((width - 0.3) * 72 / (CHAR_WIDTH * 7.5))),
        transform=inch,
        fontsize=7.5,
        va="top",
        style="italic",
        linespacing=1.25,
    )
    return fig


def overview(pages: Pages, outlines: gpd.GeoSeries) -> Figure:
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
    extent = fit_extent(
        frame.total_bounds, width / height, 0.0, 0.03 * np.ptp(frame.total_bounds[[0, 2]])
    )
    ax = map_axes(fig, (lay.margin, bottom, width, height), extent)
    context = frame[~frame["treated"]]
    ax.add_collection(
        LineCollection(
            line_segments(context.geometry.values), colors="0.6", linewidths=0.4, zorder=2
        )
    )
    draw_units_by_condition(ax, frame[frame["treated"]], ["treated"])
    xy = label_points(frame.geometry[frame["treated"]])
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
    draw_district_outlines(ax, outlines)
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
        legend_handles(data.condition_labels, ["treated"], outlines.name)[0],
        Line2D([], [], color="0.6", linewidth=0.4, label="other units"),
        *legend_handles(data.condition_labels, [], outlines.name)[-2:],
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
    mid = label_points(pick.geometry)
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
            size = FONT
            if kind == "id":
                # Ids are never wrapped or cut (a reader must find each one whole): long ones shrink.
                need = len(value) * CHAR_WIDTH * size / 72
                size = max(3.5, size * min(1.0, (col_width - 0.1) / max(need, 1e-9)))
                text = value
            elif kind == "number":
                text = value
                size = 8.5
            else:
                text = wrap(value, col_width - 0.1, 2)
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


def district_pages(pages: Pages, district: DistrictPages, outlines: gpd.GeoSeries) -> list[Figure]:
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
    xy = label_points(treated.geometry)
    bounds = (xy[:, 0].min(), xy[:, 1].min(), xy[:, 0].max(), xy[:, 1].max())
    tb = treated.total_bounds
    bounds = (
        min(bounds[0], tb[0]),
        min(bounds[1], tb[1]),
        max(bounds[2], tb[2]),
        max(bounds[3], tb[3]),
    )
    span = max(bounds[2] - bounds[0], bounds[3] - bounds[1])
    extent = fit_extent(
        bounds,
        width / lay.map_height,
        500.0 / data.metres_per_unit,
        max(150.0 / data.metres_per_unit, 0.08 * span),
    )
    ax = map_axes(fig, (lay.margin, map_bottom, width, lay.map_height), extent)
    view = frame.iloc[frame.sindex.query(shapely.box(*extent), predicate="intersects")]
    own = view["district"].to_numpy() == district.name
    # Places of other districts stay on the map for orientation, faded, so that a team
    # does not take another district's treated place for one of its own.
    draw_units_by_condition(ax, view[~own], condition_order(view["condition"].unique()), alpha=0.3)
    draw_units_by_condition(ax, view[own], condition_order(view["condition"].unique()))
    draw_district_outlines(ax, outlines)
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
        handles=legend_handles(data.condition_labels, codes, outlines.name),
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
