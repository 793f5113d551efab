"""The caution every report, map, briefing pack and the README carry, in plain words, in one place.

Field staff get more specific lines in :data:`geoexp.briefing.FIELD_NOTES`.
"""

CAUTION = (
    "geoexp supports, but does not replace, ethics review, legal advice, community "
    "consultation and the judgement of the agencies involved. Local law governs what a "
    "trial may do. A trial that changes policing or other services affects people: "
    "decide with them, not only about them."
)
