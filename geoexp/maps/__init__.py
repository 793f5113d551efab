"""Maps for planning a trial, for the people who carry it out, and for its results.

:func:`planning_map` makes the interactive planning map of a drawn trial
(switchable condition, eligibility, ring, district and probability layers,
tooltips, legend, scale, and a drawing tool for exclusion zones);
:func:`drawing_map` makes a map of the units with only the drawing tool, for
sketching exclusion zones before a design exists; :func:`save_map` writes
either as one self-contained HTML page that needs no network apart from
base-map tiles (Leaflet and Leaflet.draw ship with geoexp).
:func:`condition_style` is the one colour, width and dash pattern per exposure
condition that every geoexp map (web or print) uses, and
:func:`district_outlines` the one set of district outlines they all draw.
After the analysis, :func:`result_map` (interactive) and
:func:`result_map_static` (matplotlib, for the report) map the observed change
per unit by condition with the spillover bands, estimates and verdicts.
:func:`delivery_map_static` maps a week's under-served treated places and
visited control places for the delivery monitor.

The static renderer shared with the briefing pack: :data:`PRINT_RC` (the one
print style), :func:`line_style`, :func:`draw_units_by_condition`,
:func:`draw_district_outlines`, :func:`halo_text`,
:func:`scale_bar_and_north_arrow`, :func:`condition_handle` and
:func:`district_handle`.
"""

from geoexp.maps._assets import OfflineAssetWarning, offline_assets_available
from geoexp.maps._delivery_static import delivery_map_static
from geoexp.maps._drawing import drawing_map
from geoexp.maps._geometry import district_outlines, metres_per_unit
from geoexp.maps._page import ZONES_FILENAME, map_html, save_map
from geoexp.maps._palette import OKABE_ITO, ConditionStyle, condition_order, condition_style
from geoexp.maps._planning import planning_map
from geoexp.maps._result_data import change_limit
from geoexp.maps._result_static import result_map_static
from geoexp.maps._results import result_map, save_result_map
from geoexp.maps._static import (
    PRINT_RC,
    PrintLineStyle,
    condition_handle,
    district_handle,
    draw_district_outlines,
    draw_units_by_condition,
    halo_text,
    line_segments,
    line_style,
    nice_length,
    north_arrow,
    scale_bar,
    scale_bar_and_north_arrow,
    true_north_angle,
)

__all__ = [
    "delivery_map_static",
    "OKABE_ITO",
    "PRINT_RC",
    "ZONES_FILENAME",
    "ConditionStyle",
    "OfflineAssetWarning",
    "PrintLineStyle",
    "change_limit",
    "condition_handle",
    "condition_order",
    "condition_style",
    "district_handle",
    "district_outlines",
    "draw_district_outlines",
    "draw_units_by_condition",
    "drawing_map",
    "halo_text",
    "line_segments",
    "line_style",
    "map_html",
    "metres_per_unit",
    "nice_length",
    "north_arrow",
    "offline_assets_available",
    "planning_map",
    "result_map",
    "result_map_static",
    "save_map",
    "save_result_map",
    "scale_bar",
    "scale_bar_and_north_arrow",
    "true_north_angle",
]
