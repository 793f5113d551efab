"""The cautions every report, map pack and the README carry, in plain words, in one place."""

CAUTION = (
    "geoexp supports, but does not replace, ethics review, legal advice, community "
    "consultation and the judgement of the agencies involved. Local law governs what a "
    "trial may do. A trial that changes policing or other services affects people: "
    "decide with them, not only about them."
)

FIELD_STAFF = (
    "Treat everyone you meet with respect; the trial is about places, not people.",
    "Follow the law and your agency's policy at all times; the list changes where you go, "
    "not what you may do.",
    "Do not change the list yourself: if a place cannot be visited or should not be, tell "
    "the trial lead.",
    "Report problems, complaints and incidents involving the trial to the trial lead.",
)
