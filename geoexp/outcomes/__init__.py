"""Outcomes of a trial: incident points turned into counts per unit and period.

:func:`count_incidents` reads incident points (a CSV with x/y or
longitude/latitude columns, a point layer, or a frame), snaps each to the
nearest unit within a tolerance in metres and counts them per unit in a
pre-period and a post-period, optionally per incident type. What could not be
counted is reported by reason in a :class:`DropReport` (and, if asked, written
row by row to a CSV). :meth:`OutcomeTable.from_counts` takes counts that were
made elsewhere. :func:`save_outcomes` and :func:`load_outcomes` keep the table
in the trial file.
"""

from geoexp.outcomes._counts import (
    MAX_DROPPED_SHARE,
    REASONS,
    DropReport,
    OutcomeTable,
    count_incidents,
    load_outcomes,
    save_outcomes,
)

__all__ = [
    "MAX_DROPPED_SHARE",
    "REASONS",
    "DropReport",
    "OutcomeTable",
    "count_incidents",
    "load_outcomes",
    "save_outcomes",
]
