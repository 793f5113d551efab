"""Printable briefing packs for field teams.

:func:`briefing_pack` writes a PDF (A4 or US Letter) with a cover carrying the
cautions for field staff, an overview map of all districts, and for each
district a map of its numbered treated places with the list that goes with it.
:func:`plan_briefing` tells in advance which districts, numbers and pages the
pack will have. :func:`field_list` is the list of treated places for patrols,
numbered as in the pack, with coordinates and an RFC 5870 ``geo:`` link per
place; :func:`save_field_list` writes it as CSV and GeoJSON.
"""

from geoexp.briefing._field_list import field_list, geo_uri, save_field_list
from geoexp.briefing._load import plan_briefing
from geoexp.briefing._pack import briefing_figures, briefing_pack
from geoexp.briefing._pages import FIELD_NOTES
from geoexp.briefing._plan import BriefingPlan, DistrictPages, PageLayout, page_layout

__all__ = [
    "FIELD_NOTES",
    "BriefingPlan",
    "DistrictPages",
    "PageLayout",
    "briefing_figures",
    "briefing_pack",
    "field_list",
    "geo_uri",
    "page_layout",
    "plan_briefing",
    "save_field_list",
]
