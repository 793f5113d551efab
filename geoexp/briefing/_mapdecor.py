"""Map furniture for printed maps: scale bar, north arrow and labels with a white halo."""

from __future__ import annotations

import math

from matplotlib import patheffects
from matplotlib.axes import Axes
from matplotlib.patches import Rectangle
from matplotlib.text import Text


def halo_text(ax: Axes, x: float, y: float, text: str, *, halo: float = 2.6, **kwargs) -> Text:
    """Write ``text`` with a white halo, keeping the glyphs as real (searchable) text.

    Matplotlib draws text that has path effects as outlines, which a PDF reader
    cannot search or copy; so the halo is a separate outline-only copy drawn
    underneath, and the text on top stays text.
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
    """Largest 1, 2 or 5 times a power of ten that does not exceed ``limit`` (> 0)."""
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
) -> float:
    """Draw a black-and-white scale bar in metres; return its length in metres.

    The axes must already have their final limits and an equal aspect. A data
    unit is ``metres_per_unit`` metres (1 for metre CRSs, 0.3048 for
    international feet, 1200/3937 for US survey feet), so the bar is right in
    any projected CRS. The bar is the longest 1-2-5 length within ``fraction``
    of the map's width, in four alternating blocks.
    """
    x0, x1 = ax.get_xlim()
    y0, y1 = ax.get_ylim()
    width_m = (x1 - x0) * metres_per_unit
    length_m = nice_length(width_m * fraction)
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
    for frac, label in ((0.0, "0"), (0.5, f"{length_m / 2:g}"), (1.0, _metres_label(length_m))):
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
    and projecting back.
    """
    from pyproj import Transformer

    to_geographic = Transformer.from_crs(crs, 4326, always_xy=True)
    to_map = Transformer.from_crs(4326, crs, always_xy=True)
    lon, lat = to_geographic.transform(x, y)
    step = 0.001 if lat < 89.0 else -0.001
    x2, y2 = to_map.transform(lon, lat + step)
    dx, dy = (x2 - x) * math.copysign(1, step), (y2 - y) * math.copysign(1, step)
    return math.degrees(math.atan2(-dx, dy))


def north_arrow(
    ax: Axes, *, angle: float = 0.0, anchor: tuple[float, float] = (0.95, 0.86)
) -> None:
    """Draw a north arrow pointing ``angle`` degrees counter-clockwise from the map's top."""
    fig = ax.figure
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
        "N",
        transform=ax.transAxes,
        ha="center",
        va="center",
        fontsize=10,
        fontweight="bold",
        zorder=22,
        bbox={
            "boxstyle": "circle,pad=0.15",
            "facecolor": "white",
            "edgecolor": "none",
            "alpha": 0.9,
        },
    )


def scale_bar_and_north_arrow(ax: Axes, *, crs, metres_per_unit: float, bounds) -> None:
    """Draw a scale bar and a north arrow pointing to true north at the middle of ``bounds``.

    ``bounds`` is ``(xmin, ymin, xmax, ymax)`` in the map's CRS, usually the
    extent the map shows.
    """
    scale_bar(ax, metres_per_unit=metres_per_unit)
    cx, cy = (bounds[0] + bounds[2]) / 2, (bounds[1] + bounds[3]) / 2
    north_arrow(ax, angle=true_north_angle(crs, cx, cy))
