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

from geoexp.briefing._chrome import (
    CHAR_WIDTH,
    CONTEXT_GREY,
    FONT,
    Pages,
    fit_extent,
    human_time,
    legend_handles,
    map_axes,
    wrap,
)
from geoexp.briefing._load import label_points
from geoexp.briefing._placement import MARKER_SIZE, NUMBER_OFFSETS, Placer, marker_boxes
from geoexp.briefing._plan import ALL_UNITS, DistrictPages, PageLayout
from geoexp.briefing._visit_log import visit_log_pages
from geoexp.cautions import CAUTION
from geoexp.maps import (
    draw_district_outlines,
    draw_units_by_condition,
    line_segments,
    north_arrow,
    scale_bar,
    true_north_angle,
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

STREET_FONT = 7.0  # points: street names stay readable on paper (at least 7 pt)
NOTE_FONT = 7.0
NUDGES = ((1, 0), (-1, 0), (0, 1), (0, -1), (1, 1), (-1, -1), (1, -1), (-1, 1))
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
            f"{human_time(meta.get('drawn_at'))} (draw {meta.get('draw_number', '?')})",
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
    # Only what a team needs: its own places. City-wide counts of control and spillover
    # places are for analysts (design check, report), not for the street.
    fig.text(
        x,
        y,
        f"Treated places in this pack: {plan.n_treated:,} in {len(plan.districts):,} "
        f"district{'s' if len(plan.districts) != 1 else ''}",
        transform=inch,
        fontsize=10,
        fontweight="bold",
    )
    y -= 0.36

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


def _markers(ax, xy: np.ndarray) -> None:
    """The numbered places' markers: white dots with a black ring, above every line."""
    dots = ax.scatter(
        xy[:, 0],
        xy[:, 1],
        s=MARKER_SIZE,
        facecolor="white",
        edgecolor="black",
        linewidth=1.0,
        zorder=10,
    )
    dots.set_gid("place")


def _context(ax, frame: gpd.GeoDataFrame, alpha: float = 1.0) -> None:
    """Streets and parcels that are not treated places, all alike in light grey."""
    lines = LineCollection(
        line_segments(frame.geometry.values),
        colors=CONTEXT_GREY,
        linewidths=0.6,
        zorder=2,
        alpha=alpha,
    )
    lines.set_gid("context")
    ax.add_collection(lines)


def _treated(ax, places: gpd.GeoDataFrame) -> None:
    """The treated places in the project's print style, tagged ``treated`` for checks."""
    before = len(ax.collections)
    draw_units_by_condition(ax, places, ["treated"])
    for artist in ax.collections[before:]:
        artist.set_gid("treated")


def _borders(outlines: gpd.GeoSeries) -> gpd.GeoSeries:
    """District boundaries with each shared border once (drawn twice, dashes would double)."""
    if len(outlines) == 0:
        return outlines
    merged = shapely.line_merge(shapely.union_all(shapely.boundary(outlines.values)))
    return gpd.GeoSeries([merged], crs=outlines.crs)


def _place_furniture(placer: Placer, frame: gpd.GeoDataFrame, data, extent) -> bool:
    """Scale bar and north arrow in corners free of numbered places; False if none is free."""
    ax = placer.ax
    mpu = data.metres_per_unit
    cx, cy = (extent[0] + extent[2]) / 2, (extent[1] + extent[3]) / 2
    angle = true_north_angle(frame.crs, cx, cy)
    bars = [
        (fraction, anchor)
        for fraction in (0.25, 0.15)
        for anchor in (
            (0.03, 0.035),
            (0.97 - fraction - 0.07, 0.035),
            (0.03, 0.9),
            (0.97 - fraction - 0.07, 0.9),
        )
    ]
    placed_bar = placer.furniture(
        bars,
        lambda c: scale_bar(ax, metres_per_unit=mpu, fraction=c[0], anchor=c[1]),
        "scale-bar",
    )
    arrows = ((0.95, 0.86), (0.05, 0.86), (0.95, 0.14), (0.05, 0.14), (0.5, 0.86), (0.5, 0.14))
    placed_arrow = placer.furniture(
        arrows, lambda c: north_arrow(ax, angle=angle, anchor=c), "north-arrow"
    )
    return placed_bar and placed_arrow


def _map_with_furniture(fig, rect, extent, xy, frame, data, draw) -> tuple:
    """Draw a map whose scale bar and north arrow cover no numbered place.

    ``draw(ax)`` draws the lines. When no corner is free, the map zooms out a
    step (the places then sit nearer the middle) and is drawn again.
    """
    for _ in range(5):
        ax = map_axes(fig, rect, extent)
        draw(ax)
        _markers(ax, xy)
        placer = Placer(ax, marker_boxes(ax, xy))
        if _place_furniture(placer, frame, data, extent):
            return ax, placer, extent
        fig.delaxes(ax)
        cx, cy = (extent[0] + extent[2]) / 2, (extent[1] + extent[3]) / 2
        w, h = (extent[2] - extent[0]) * 1.2, (extent[3] - extent[1]) * 1.2
        extent = (cx - w / 2, cy - h / 2, cx + w / 2, cy + h / 2)
    # Five zoom steps leave the places in the middle third of the map, so this is not
    # expected; if it happens the map says what it lacks rather than cover a place.
    ax = map_axes(fig, rect, extent)
    draw(ax)
    _markers(ax, xy)
    left, bottom, width, _ = rect
    fig.text(
        left + width,
        bottom - 0.03,
        "scale bar and north arrow left off: no corner free of numbered places",
        transform=fig.dpi_scale_trans,
        fontsize=NOTE_FONT,
        ha="right",
        va="top",
        style="italic",
    )
    return ax, Placer(ax, marker_boxes(ax, xy)), extent


def _numbers(placer: Placer, xy: np.ndarray, numbers, fontsize: float) -> list[int]:
    """Number each place beside its marker; return the numbers that found no room."""
    left_off = []
    for n, (px, py) in zip(numbers, xy, strict=True):
        ok = placer.text(
            px,
            py,
            str(n),
            NUMBER_OFFSETS,
            gid="place-number",
            fontsize=fontsize,
            fontweight="bold",
            zorder=11,
            halo=3.5,
        )
        if not ok:
            left_off.append(n)
    return left_off


def _off_map_note(fig, lay: PageLayout, y: float, numbers: list, streets: list) -> None:
    parts = []
    if numbers:
        parts.append(
            "No room on the map for the numbers "
            + ", ".join(str(n) for n in numbers)
            + ": find them in the list by street."
        )
    if streets:
        parts.append("Also on this map: " + ", ".join(streets) + ".")
    if parts:
        fig.text(
            lay.margin,
            y,
            wrap(" ".join(parts), lay.width - 2 * lay.margin, 1, NOTE_FONT),
            transform=fig.dpi_scale_trans,
            fontsize=NOTE_FONT,
            style="italic",
            va="bottom",
        )


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
    number_of = {
        uid: n for d in plan.districts for uid, n in zip(d.unit_ids, d.numbers, strict=True)
    }
    in_pack = frame[frame.index.isin(list(number_of))]
    xy = label_points(in_pack.geometry)
    numbers = [number_of[uid] for uid in in_pack.index]

    def draw(ax):
        _context(ax, frame[~frame.index.isin(in_pack.index)])
        _treated(ax, in_pack)
        draw_district_outlines(ax, _borders(outlines))

    ax, placer, extent = _map_with_furniture(
        fig, (lay.margin, bottom, width, height), extent, xy, frame, data, draw
    )
    left_off: list[int] = []
    if plan.n_treated <= _OVERVIEW_NUMBERS_MAX:
        left_off = _numbers(placer, xy, numbers, 6.5)
    first_page = {d.name: d.first_page for d in plan.districts}
    label_at = shapely.get_coordinates(shapely.point_on_surface(outlines.values))
    unlabelled = []
    for (name, _), (lx, ly) in zip(outlines.items(), label_at, strict=True):
        page = first_page.get(name)
        text = f"{name}\n(page {page})" if page else f"{name}\n(no treated places)"
        nudges = [(0.0, 0.0)] + [(dx * 18, dy * 14) for dx, dy in NUDGES]
        ok = placer.text(
            lx,
            ly,
            text,
            nudges,
            gid="district-label",
            ha="center",
            va="center",
            fontsize=9,
            fontweight="bold",
            zorder=9,
            halo=3.5,
        )
        if not ok:
            unlabelled.append(f"{name} (page {page})" if page else name)
    _off_map_note(fig, lay, lay.margin + lay.footer + 0.02, left_off, [])
    if unlabelled:
        fig.text(
            lay.margin + width,
            lay.margin + lay.footer + 0.02,
            "Districts not named on the map: " + ", ".join(unlabelled),
            transform=fig.dpi_scale_trans,
            fontsize=NOTE_FONT,
            ha="right",
            style="italic",
        )
    handles = [
        legend_handles(data.condition_labels, ["treated"], outlines.name)[0],
        *legend_handles(data.condition_labels, [], outlines.name),
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
    placer: Placer, frame: gpd.GeoDataFrame, treated: gpd.GeoDataFrame, limit: int = 20
) -> list[str]:
    """Name the streets near the treated places, once each; return the names left off.

    Each street is named on its piece nearest to a treated place that does not
    touch one, so the name sits beside the numbers rather than on top of them.
    A name that would cover a place, a number, another name or the map's edge
    is left off the map and listed under it instead.
    """
    named = frame[(frame["street"] != "") & frame.geom_type.isin(["LineString"])]
    if named.empty:
        return []
    near, distance = treated.sindex.nearest(named.geometry, return_distance=True)
    gap = np.full(len(named), np.inf)
    np.minimum.at(gap, near[0], distance)
    ranked = named.assign(_gap=gap).loc[lambda f: f["_gap"] > 0].sort_values("_gap", kind="stable")
    wanted = list(dict.fromkeys(ranked["street"]))[:limit]
    if not wanted:
        return []
    starts = shapely.get_point(ranked.geometry.values, 0)
    ends = shapely.get_point(ranked.geometry.values, -1)
    dx = shapely.get_x(ends) - shapely.get_x(starts)
    dy = shapely.get_y(ends) - shapely.get_y(starts)
    angle = np.degrees(np.arctan2(dy, dx))
    # Keep the text upright: turn labels that would read downwards by half a turn.
    angle = np.where(angle > 90, angle - 180, np.where(angle < -90, angle + 180, angle))
    mid = label_points(ranked.geometry)
    names = ranked["street"].to_numpy()
    left_off = []
    for street in wanted:
        # Try the street's pieces nearest the places first, then the farther ones.
        done = False
        for k in np.flatnonzero(names == street)[:6]:
            done = placer.text(
                mid[k, 0],
                mid[k, 1],
                street,
                gid="street-label",
                rotation=angle[k],
                rotation_mode="anchor",
                ha="center",
                va="center",
                fontsize=STREET_FONT,
                style="italic",
                color="0.1",
                zorder=9,
            )
            if done:
                break
        if not done:
            left_off.append(street)
    return left_off


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
            "… text cut short here; the full text is in the field list (geoexp field-list).",
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
    pack_ids = set(ids)

    def draw(ax):
        x0, y0, x1, y1 = ax.get_xlim()[0], ax.get_ylim()[0], ax.get_xlim()[1], ax.get_ylim()[1]
        view = frame.iloc[frame.sindex.query(shapely.box(x0, y0, x1, y1), predicate="intersects")]
        mine = view.index.isin(list(pack_ids))
        # Only this district's treated places stand out. Every other place is a grey street:
        # a patrol map that marked control or spillover places would invite visits there.
        # Other districts' treated places stay faded, for orientation.
        _context(ax, view[~mine])
        others = view[view["treated"].to_numpy() & ~mine]
        draw_units_by_condition(ax, others, ["treated"], alpha=0.3)
        _treated(ax, view[mine])
        draw_district_outlines(ax, _borders(outlines))

    ax, placer, extent = _map_with_furniture(
        fig, (lay.margin, map_bottom, width, lay.map_height), extent, xy, frame, data, draw
    )
    left_numbers = _numbers(placer, xy, numbers, 10)
    view = frame.iloc[frame.sindex.query(shapely.box(*extent), predicate="intersects")]
    left_streets = _street_labels(placer, view, treated)
    fig.legend(
        handles=legend_handles(data.condition_labels, ["treated"], outlines.name),
        loc="upper left",
        bbox_to_anchor=(lay.margin, map_bottom - 0.03),
        bbox_transform=fig.dpi_scale_trans,
        ncol=4,
        frameon=False,
        fontsize=7,
        handlelength=3.2,
        columnspacing=1.2,
        borderaxespad=0.0,
    )
    table_top = map_bottom - lay.legend_strip
    _off_map_note(fig, lay, table_top + 0.04, left_numbers, left_streets)
    first, rest = rows[: lay.rows_first], rows[lay.rows_first :]
    _draw_table(fig, lay, table_top, first, columns)
    figures = [fig]
    for k in range(1, district.n_list_pages):
        chunk = rest[(k - 1) * lay.rows_continued : k * lay.rows_continued]
        fig = pages.new(f"{title} (list continued, {k + 1} of {district.n_list_pages})", count)
        _draw_table(fig, lay, pages.body_top, chunk, columns)
        figures.append(fig)
    figures.extend(visit_log_pages(pages, district, title))
    return figures
