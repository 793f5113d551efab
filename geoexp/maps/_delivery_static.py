"""A small static map for the weekly delivery monitor: where to send the patrols next week.

Drawn with the one static renderer and print style of the briefing pack
(:data:`PRINT_RC`, :func:`draw_units_by_condition`, the district outlines of
:func:`district_outlines`): every unit as a faint grey line, the under-served
treated places and the visited control places of the week in their
condition's print style, a scale bar and a north arrow.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import geopandas as gpd
import numpy as np
from matplotlib.collections import LineCollection
from matplotlib.lines import Line2D

from geoexp.maps._geometry import district_outlines, metres_per_unit
from geoexp.maps._static import (
    PRINT_RC,
    condition_handle,
    district_handle,
    draw_district_outlines,
    draw_units_by_condition,
    line_segments,
    scale_bar_and_north_arrow,
)

if TYPE_CHECKING:
    from matplotlib.axes import Axes

    from geoexp.delivery import DeliveryWeek


def delivery_map_static(
    units: gpd.GeoDataFrame,
    week: DeliveryWeek,
    *,
    district_column: str | None = None,
    ax: Axes | None = None,
) -> Axes:
    """Map of one week's under-served treated places and visited control places.

    Parameters
    ----------
    units : geopandas.GeoDataFrame
        The trial's units, indexed by unit id, in a projected or local planar CRS.
    week : geoexp.delivery.DeliveryWeek
        The monitor's week (:func:`geoexp.delivery.delivery_week`).
    district_column : str, optional
        The units' district column: district outlines are drawn from it
        (:func:`district_outlines`, the same outlines as every geoexp map).
    ax : matplotlib.axes.Axes, optional
        Axes to draw on; a new 6 x 6 inch figure by default.

    Returns
    -------
    matplotlib.axes.Axes
        The map's axes: the grey street grid first, then the listed places
        (places of the lists missing from ``units`` are not drawn).
    """
    import matplotlib.pyplot as plt

    under = [u for u in week.under_served.index if u in units.index]
    visited = [u for u in week.visited_controls.index if u in units.index]
    with plt.rc_context(PRINT_RC):
        if ax is None:
            _, ax = plt.subplots(figsize=(6, 6))
        scale = metres_per_unit(units)
        background = line_segments(np.asarray(units.geometry.values))
        ax.add_collection(LineCollection(background, colors="0.82", linewidths=0.3, zorder=1))
        handles: list[Line2D] = []
        outlines, _ = district_outlines(units, district_column)
        if outlines is not None:
            draw_district_outlines(ax, outlines)
            handles.append(district_handle("district"))
        if under:
            frame = units.loc[under, ["geometry"]].assign(condition="treated")
            draw_units_by_condition(ax, gpd.GeoDataFrame(frame, crs=units.crs))
            handles.append(condition_handle("treated", f"treated, under-served ({len(under)})"))
        if visited:
            codes = week.visited_controls.loc[visited, "condition"].astype(str)
            frame = units.loc[visited, ["geometry"]].assign(condition=codes.to_numpy())
            order = sorted(set(codes))
            draw_units_by_condition(ax, gpd.GeoDataFrame(frame, crs=units.crs), order)
            for code in order:
                n = int((codes == code).sum())
                handles.append(condition_handle(code, f"{code}, visited ({n})"))
        xmin, ymin, xmax, ymax = units.total_bounds
        pad = 0.03 * max(xmax - xmin, ymax - ymin, 1.0)
        ax.set_xlim(xmin - pad, xmax + pad)
        ax.set_ylim(ymin - pad, ymax + pad)
        ax.set_aspect("equal")
        ax.set_xticks([])
        ax.set_yticks([])
        scale_bar_and_north_arrow(
            ax,
            crs=units.crs,
            metres_per_unit=scale,
            bounds=(xmin - pad, ymin - pad, xmax + pad, ymax + pad),
        )
        ax.set_title(
            f"Delivery in the week of {week.week}: under-served treated places and visited "
            f"control places\n(planned dose {week.planned_minutes:g} minutes per treated place "
            "per week)",
            fontsize="small",
        )
        if handles:
            # below the map, clear of the scale bar and the north arrow
            ax.legend(
                handles=handles,
                fontsize="x-small",
                loc="upper center",
                bbox_to_anchor=(0.5, -0.01),
                ncol=2,
                frameon=False,
            )
        else:
            ax.text(
                0.5,
                0.5,
                "every treated place at the planned dose; no control place visited",
                transform=ax.transAxes,
                ha="center",
            )
    return ax
