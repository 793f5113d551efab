"""Maps for planning a trial and for the people who carry it out.

:func:`planning_map` makes the interactive planning map of a drawn trial
(switchable condition, eligibility, ring, district and probability layers,
tooltips, legend, scale, and a drawing tool for exclusion zones);
:func:`drawing_map` makes a map of the units with only the drawing tool, for
sketching exclusion zones before a design exists; :func:`save_map` writes
either as one self-contained HTML page that needs no network apart from
base-map tiles. :func:`condition_style` is the one colour, width and dash
pattern per exposure condition that every geoexp map (web or print) uses.
After the analysis, :func:`result_map` (interactive) and
:func:`result_map_static` (matplotlib, for the report) map the observed change
per unit by condition with the spillover bands, estimates and verdicts.
"""

from geoexp.maps._assets import OfflineAssetWarning, offline_assets_available
from geoexp.maps._palette import OKABE_ITO, ConditionStyle, condition_order, condition_style
from geoexp.maps._planning import ZONES_FILENAME, drawing_map, map_html, planning_map, save_map
from geoexp.maps._results import result_map, result_map_static, save_result_map

__all__ = [
    "OKABE_ITO",
    "ZONES_FILENAME",
    "ConditionStyle",
    "OfflineAssetWarning",
    "condition_order",
    "condition_style",
    "drawing_map",
    "map_html",
    "offline_assets_available",
    "planning_map",
    "result_map",
    "result_map_static",
    "save_map",
    "save_result_map",
]
