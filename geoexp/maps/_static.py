"""The one static (matplotlib) map renderer for print and reports.

Shared by the briefing pack and the static result map: the print style (one
set of rc settings, print line widths), units drawn by condition in the
palette's colours, widths and dash patterns, district outlines, text with a
white halo, a scale bar and a north arrow, and legend handles.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Literal

import geopandas as gpd
import numpy as np
import shapely
from matplotlib import patheffects
from matplotlib.axes import Axes
from matplotlib.collections import LineCollection
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Rectangle
from matplotlib.text import Text

from geoexp.maps._palette import condition_style

if TYPE_CHECKING:
    from matplotlib.typing import RcKeyType

# The palette's widths are screen pixels for the web maps; at full width on paper the
# street grid would swamp the page, so print scales every width (and with it every dash).
PRINT_WIDTH = 0.55
PRINT_RC: dict[RcKeyType, Any] = {
    # Type 42 (TrueType) keeps text as text, so unit ids can be searched and copied.
    "pdf.fonttype": 42,
    "font.family": "DejaVu Sans",
    "pdf.compression": 6,
    "axes.linewidth": 0.8,
    # User text (trial names, descriptions, street names) is text, never math:
    # a "$" in a name must not start a formula.
    "text.parse_math": False,
}
DISTRICT_COLOUR = "0.15"
DISTRICT_WIDTH = 1.0
DISTRICT_DASH = (0, (6, 3))


@dataclass(frozen=True)
class PrintLineStyle:
    """A condition's line on paper: colour, width (points), dash pattern and drawing order."""

    color: str
    linewidth: float
    linestyle: Literal["solid"] | tuple[float, tuple[float, ...]]
    zorder: float


def line_style(code: str) -> PrintLineStyle:
    """The project's style of a condition (:func:`geoexp.maps.condition_style`), sized for paper.

    Parameters
    ----------
    code : str
        A condition code: ``"treated"``, ``"spillover_<k>"`` (band k) or any
        other (control, ineligible).

    Returns
    -------
    PrintLineStyle
        Colour, line width in points, dash pattern and drawing order: treated on
        top (6), the spillover bands below it, nearer bands higher, the rest
        at 2.
    """
    look = condition_style(code)
    if code == "treated":
        zorder = 6.0
    elif code.startswith("spillover_"):
        zorder = 5.0 - 1.0 / (1 + int(code.rsplit("_", 1)[1]))
    else:
        zorder = 2.0
    return PrintLineStyle(look.colour, look.width * PRINT_WIDTH, look.mpl_linestyle, zorder)


def line_segments(geoms: np.ndarray) -> list[np.ndarray]:
    """Coordinate arrays of the lines to draw: lines as they are, polygons by their boundaries.

    Parameters
    ----------
    geoms : numpy.ndarray
        Shapely geometries (lines, polygons, points or collections of them).

    Returns
    -------
    list of numpy.ndarray
        One (n, 2) array of coordinates per line part, in the geometries' CRS;
        points are left out. Empty when ``geoms`` is empty.
    """
    if len(geoms) == 0:
        return []
    polygonal = np.isin(shapely.get_type_id(geoms), (3, 6))
    geoms = np.where(polygonal, shapely.boundary(geoms), geoms)
    parts = shapely.get_parts(geoms)
    parts = parts[np.isin(shapely.get_type_id(parts), (1, 2))]
    coords, index = shapely.get_coordinates(parts, return_index=True)
    return np.split(coords, np.flatnonzero(np.diff(index)) + 1)


def draw_units_by_condition(
    ax: Axes,
    frame: gpd.GeoDataFrame,
    conditions: Sequence[str] | None = None,
    *,
    alpha: float = 1.0,
) -> None:
    """Draw units (column ``condition``) in each condition's print line style.

    Treated units get a black casing, so they stay the darkest lines on a grey
    printout; point units are drawn as dots.

    Parameters
    ----------
    ax : matplotlib.axes.Axes
        The map's axes.
    frame : geopandas.GeoDataFrame
        The units, with a ``condition`` column of condition codes.
    conditions : sequence of str, optional
        The codes to draw, in drawing order (default: every code in ``frame``,
        in order of first appearance).
    alpha : float, default 1.0
        Opacity, 0 (invisible) to 1 (opaque).
    """
    codes = conditions if conditions is not None else frame["condition"].unique()
    for code in codes:
        geoms = frame.geometry.values[frame["condition"].to_numpy() == code]
        style = line_style(code)
        segs = line_segments(np.asarray(geoms))
        if segs and code == "treated":
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


def condition_handle(code: str, label: str) -> Line2D:
    """A legend handle for a condition's print line (with the treated casing).

    Parameters
    ----------
    code : str
        The condition code whose print line style the handle shows.
    label : str
        The legend text.

    Returns
    -------
    matplotlib.lines.Line2D
        An empty line carrying the style and label, for ``ax.legend``.
    """
    style = line_style(code)
    casing = (
        [
            patheffects.Stroke(linewidth=style.linewidth + 1.6, foreground="black"),
            patheffects.Normal(),
        ]
        if code == "treated"
        else None
    )
    return Line2D(
        [],
        [],
        color=style.color,
        linewidth=style.linewidth,
        linestyle=style.linestyle,
        label=label,
        path_effects=casing,
    )


def district_handle(label: str) -> Line2D:
    """A legend handle for the district outlines.

    Parameters
    ----------
    label : str
        The legend text.

    Returns
    -------
    matplotlib.lines.Line2D
        An empty line in the district outline's colour, width and dashes.
    """
    return Line2D(
        [],
        [],
        color=DISTRICT_COLOUR,
        linewidth=DISTRICT_WIDTH,
        linestyle=DISTRICT_DASH,
        label=label,
    )


def draw_district_outlines(
    ax: Axes, outlines: gpd.GeoDataFrame | gpd.GeoSeries, *, label: str = "district"
) -> Line2D:
    """District outlines (from :func:`geoexp.maps.district_outlines`) as dark dashed lines.

    The collection has the ``gid`` ``"districts"``. Returns a legend handle.

    Parameters
    ----------
    ax : matplotlib.axes.Axes
        The map's axes.
    outlines : geopandas.GeoDataFrame or geopandas.GeoSeries
        The outlines, in the map's CRS.
    label : str, default "district"
        The legend text of the handle.

    Returns
    -------
    matplotlib.lines.Line2D
        The legend handle (see :func:`district_handle`).
    """
    geoms = np.asarray(outlines.geometry.array if hasattr(outlines, "geometry") else outlines.array)
    lines = LineCollection(
        line_segments(np.asarray(geoms, dtype=object)),
        colors=DISTRICT_COLOUR,
        linewidths=DISTRICT_WIDTH,
        linestyles=[DISTRICT_DASH],
        zorder=3,
    )
    lines.set_gid("districts")
    ax.add_collection(lines)
    return district_handle(label)


def halo_text(ax: Axes, x: float, y: float, text: str, *, halo: float = 2.6, **kwargs) -> Text:
    """Write ``text`` with a white halo, keeping the glyphs as real (searchable) text.

    Matplotlib draws text that has path effects as outlines, which a PDF reader
    cannot search or copy; so the halo is a separate outline-only copy drawn
    underneath, and the text on top stays text.

    Parameters
    ----------
    ax : matplotlib.axes.Axes
        The axes to write on.
    x, y : float
        Position in data coordinates (or in the ``transform`` given).
    text : str
        The text.
    halo : float, default 2.6
        Width of the white halo in points.
    **kwargs
        Passed to :meth:`matplotlib.axes.Axes.text` for both copies.

    Returns
    -------
    matplotlib.text.Text
        The text on top (the halo copy is not returned).
    """
    ax.text(
        x,
        y,
        text,
        path_effects=[patheffects.Stroke(linewidth=halo, foreground="white")],
        **kwargs,
    )
    return ax.text(x, y, text, **kwargs)


def nice_length(limit: float) -> float:
    """Largest 1, 2 or 5 times a power of ten that does not exceed ``limit`` (> 0).

    Parameters
    ----------
    limit : float
        The upper bound, greater than 0 (e.g. metres).

    Returns
    -------
    float
        The length, in the unit of ``limit``.
    """
    power = 10.0 ** math.floor(math.log10(limit))
    for step in (5.0, 2.0, 1.0):
        if step * power <= limit * (1 + 1e-12):
            return step * power
    return power  # unreachable: limit / power is at least 1


def _metres_label(metres: float) -> str:
    if metres >= 1000:
        return f"{metres / 1000:g} km"
    return f"{metres:g} m"


def scale_bar(
    ax: Axes,
    *,
    metres_per_unit: float,
    fraction: float = 0.25,
    anchor: tuple[float, float] = (0.03, 0.04),
    unit: Literal["m", "ft"] = "m",
) -> float:
    """Draw a black-and-white scale bar in metres; return its length in metres.

    The axes must already have their final limits and an equal aspect. A data
    unit is ``metres_per_unit`` metres (1 for metre CRSs, 0.3048 for
    international feet, 1200/3937 for US survey feet), so the bar is right in
    any projected CRS. The bar is the longest 1-2-5 length within ``fraction``
    of the map's width, in four alternating blocks.

    Parameters
    ----------
    ax : matplotlib.axes.Axes
        The map's axes.
    metres_per_unit : float
        Metres in one data unit of the map's CRS.
    fraction : float, default 0.25
        The longest the bar may be, as a share of the map's width.
    anchor : tuple of float, default (0.03, 0.04)
        Lower-left corner of the bar in axes fractions (0 to 1).
    unit : {"m", "ft"}, default "m"
        Label the bar in metres (kilometres from 1000 m) or in feet of the
        layer's own kind.

    Returns
    -------
    float
        The bar's length in metres.
    """
    x0, x1 = ax.get_xlim()
    y0, y1 = ax.get_ylim()
    width_m = (x1 - x0) * metres_per_unit
    # ``unit="ft"`` measures the bar in feet of the layer's own kind (a layer in
    # local planar feet has no other unit a reader could check it against).
    per = metres_per_unit if unit == "ft" else 1.0
    length_m = nice_length(width_m / per * fraction) * per
    length = length_m / metres_per_unit
    height = (y1 - y0) * 0.012
    left = x0 + anchor[0] * (x1 - x0)
    bottom = y0 + anchor[1] * (y1 - y0)
    pad = (y1 - y0) * 0.012
    ax.add_patch(
        Rectangle(
            (left - pad, bottom - pad),
            length + 2 * pad + (x1 - x0) * 0.045,
            height + 2.2 * pad + (y1 - y0) * 0.022,
            facecolor="white",
            edgecolor="black",
            linewidth=0.4,
            alpha=0.9,
            zorder=20,
        )
    )
    blocks = 4
    for k in range(blocks):
        ax.add_patch(
            Rectangle(
                (left + k * length / blocks, bottom),
                length / blocks,
                height,
                facecolor="black" if k % 2 == 0 else "white",
                edgecolor="black",
                linewidth=0.6,
                zorder=21,
            )
        )
    label_y = bottom + height + pad * 0.6
    if unit == "ft":
        length_ft = round(length_m / per, 6)
        marks = ((0.0, "0"), (0.5, f"{length_ft / 2:g}"), (1.0, f"{length_ft:g} ft"))
    else:
        marks = ((0.0, "0"), (0.5, f"{length_m / 2:g}"), (1.0, _metres_label(length_m)))
    for frac, label in marks:
        ax.text(
            left + frac * length,
            label_y,
            label,
            ha="left" if frac == 1.0 else "center",
            va="bottom",
            fontsize=6.5,
            zorder=22,
        )
    return length_m


def true_north_angle(crs, x: float, y: float) -> float:
    """Angle (degrees, counter-clockwise from the map's +y axis) of true north at (x, y).

    Grid north of a projected CRS and true north differ by the meridian
    convergence; this finds true north by stepping north in latitude with pyproj
    and projecting back. Local planar coordinates (an engineering CRS, no
    geographic reference) have no true north to find: the angle is 0, grid
    north, and the arrow says so (see :func:`scale_bar_and_north_arrow`).

    Parameters
    ----------
    crs : pyproj.CRS, str or int
        The map's CRS (anything :meth:`pyproj.CRS.from_user_input` accepts).
    x, y : float
        The point, in the map's CRS.

    Returns
    -------
    float
        The angle in degrees, counter-clockwise; 0 for local planar coordinates.
    """
    from pyproj import CRS, Transformer

    if CRS.from_user_input(crs).is_engineering:
        return 0.0

    to_geographic = Transformer.from_crs(crs, 4326, always_xy=True)
    to_map = Transformer.from_crs(4326, crs, always_xy=True)
    lon, lat = to_geographic.transform(x, y)
    step = 0.001 if lat < 89.0 else -0.001
    x2, y2 = to_map.transform(lon, lat + step)
    dx, dy = (x2 - x) * math.copysign(1, step), (y2 - y) * math.copysign(1, step)
    return math.degrees(math.atan2(-dx, dy))


def north_arrow(
    ax: Axes,
    *,
    angle: float = 0.0,
    anchor: tuple[float, float] = (0.95, 0.86),
    label: str = "N",
) -> None:
    """Draw a north arrow pointing ``angle`` degrees counter-clockwise from the map's top.

    Parameters
    ----------
    ax : matplotlib.axes.Axes
        The map's axes.
    angle : float
        Direction of true north in degrees counter-clockwise from the top of
        the map (see :func:`true_north_angle`).
    anchor : tuple of float
        Centre of the arrow in axes fractions (0 to 1 from the lower left).
    label : str
        Text at the arrow's tip.
    """
    fig = ax.figure
    # a figure's own axes: a subfigure has no size of its own
    assert isinstance(fig, Figure)
    bbox = ax.get_position()
    width_in = bbox.width * fig.get_figwidth()
    height_in = bbox.height * fig.get_figheight()
    length_in = 0.42
    theta = math.radians(angle)
    # A direction in inches becomes a step in axes fractions by the axes' size in inches.
    dx = -math.sin(theta) * length_in / width_in
    dy = math.cos(theta) * length_in / height_in
    base = (anchor[0] - dx / 2, anchor[1] - dy / 2)
    tip = (anchor[0] + dx / 2, anchor[1] + dy / 2)
    ax.annotate(
        "",
        xy=tip,
        xytext=base,
        xycoords="axes fraction",
        arrowprops={"arrowstyle": "-|>,head_width=0.35,head_length=0.7", "lw": 2.0, "color": "k"},
        zorder=22,
    )
    label_at = (tip[0] + 0.35 * dx, tip[1] + 0.35 * dy)
    ax.text(
        *label_at,
        label,
        transform=ax.transAxes,
        ha="center",
        va="center",
        fontsize=10,
        fontweight="bold",
        zorder=22,
        bbox={
            "boxstyle": "circle,pad=0.15" if len(label) == 1 else "round,pad=0.15",
            "facecolor": "white",
            "edgecolor": "none",
            "alpha": 0.9,
        },
    )


def scale_bar_and_north_arrow(ax: Axes, *, crs, metres_per_unit: float, bounds) -> None:
    """Draw a scale bar and a north arrow pointing to true north at the middle of ``bounds``.

    ``bounds`` is ``(xmin, ymin, xmax, ymax)`` in the map's CRS, usually the
    extent the map shows. A layer in local planar coordinates gets an arrow to
    grid north labelled "grid N" and, when its unit is the foot, a scale bar
    in feet.

    Parameters
    ----------
    ax : matplotlib.axes.Axes
        The map's axes, with their final limits.
    crs : pyproj.CRS, str or int
        The map's CRS.
    metres_per_unit : float
        Metres in one data unit of the map's CRS.
    bounds : tuple of float
        ``(xmin, ymin, xmax, ymax)`` in the map's CRS.
    """
    from pyproj import CRS

    planar = CRS.from_user_input(crs).is_engineering
    feet = planar and abs(metres_per_unit - 1.0) > 1e-9
    scale_bar(ax, metres_per_unit=metres_per_unit, unit="ft" if feet else "m")
    cx, cy = (bounds[0] + bounds[2]) / 2, (bounds[1] + bounds[3]) / 2
    north_arrow(ax, angle=true_north_angle(crs, cx, cy), label="grid N" if planar else "N")
