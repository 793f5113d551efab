"""Outcomes of a trial: incident points turned into counts per unit and period.

:func:`count_incidents` reads incident points (a CSV with x/y or
longitude/latitude columns, a point layer, or a frame), snaps each to the
nearest unit within a tolerance in metres and counts them per unit in a
pre-period and a post-period, optionally per incident type. What could not be
counted is reported by reason in a :class:`DropReport` (and, if asked, written
row by row to a CSV). :meth:`OutcomeTable.from_counts` takes counts that were
made elsewhere. :func:`save_outcomes` and :func:`load_outcomes` keep the table
in the trial file. :func:`count_onto_units` counts incidents onto a units
layer before any trial (one period or all time, dated or not, optionally some
types only) and :func:`write_counted_layer` writes the layer with the new
column, the baseline a design ranks hot spots by. :class:`ObservedIncidents`
bundles the incidents, the periods and how to read them as one value.
"""

from geoexp.outcomes._baseline import BaselineCounts, count_onto_units, write_counted_layer
from geoexp.outcomes._counts import (
    OutcomeTable,
    count_incidents,
    load_outcomes,
    save_outcomes,
)
from geoexp.outcomes._drops import MAX_DROPPED_SHARE, REASONS, DropReport
from geoexp.outcomes._observed import DEFAULT_TOLERANCE_M, ObservedIncidents

__all__ = [
    "BaselineCounts",
    "count_onto_units",
    "write_counted_layer",
    "DEFAULT_TOLERANCE_M",
    "MAX_DROPPED_SHARE",
    "REASONS",
    "DropReport",
    "ObservedIncidents",
    "OutcomeTable",
    "count_incidents",
    "load_outcomes",
    "save_outcomes",
]
