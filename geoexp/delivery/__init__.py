"""Was the treatment delivered? Presence at units from visit logs and GPS pings.

:func:`read_visits` reads officers' visit logs (a unit id or a position,
start and end times, optional team and activity), validated row by row.
:func:`stays_from_pings` reads GPS pings in chunks (CSV or Parquet), snaps
them to units within a tolerance and groups each device's pings into stays
(rules and defaults in :class:`StayRules`). Both give a :class:`StayTable`,
whose :meth:`StayTable.dosage` gives minutes present and visits per unit per
day, ISO week or whole window (:class:`Dosage`). :func:`complier_effect`
gives the effect of treatment received beside the intention-to-treat result
(Angrist, Imbens & Rubin 1996), with the design's randomization test and an
interval by test inversion (Imbens & Rosenbaum 2005). :func:`delivery_week`
is the weekly delivery monitor: dose per exposure condition, under-served
treated places and visited controls. :func:`effects_by_period` gives the
treated (and band-1) effect in each post period with its own randomization
test and test-inversion interval, Holm-adjusted across periods (Holm 1979).
"""

from geoexp.delivery._complier import ComplierEffect, complier_effect
from geoexp.delivery._dose import dose_response_table, plot_dose_response
from geoexp.delivery._from_pings import DEFAULT_TOLERANCE_M, stays_from_pings, unit_index
from geoexp.delivery._monitor import (
    RECORD_LAYER,
    DeliveryWeek,
    delivery_week,
    plot_weekly_delivery,
    weekly_delivery,
)
from geoexp.delivery._periods import (
    MULTIPLICITY_NOTE,
    PeriodEffects,
    effects_by_period,
    holm,
    period_effects,
    plot_period_effects,
)
from geoexp.delivery._received import received_inputs, treatment_received
from geoexp.delivery._snap import UnitIndex, snap_points
from geoexp.delivery._stays import (
    DEFAULT_MAX_GAP_S,
    DEFAULT_MAX_SPEED_KMH,
    DEFAULT_MIN_MINUTES,
    StayBuilder,
    StayRules,
    rest_steps,
    stay_bounds,
)
from geoexp.delivery._table import FREQUENCIES, Dosage, StayTable
from geoexp.delivery._timeline import (
    PreTrend,
    condition_series,
    incidents_by_period,
    plot_over_time,
    pre_trend,
)
from geoexp.delivery._visits import read_visits

__all__ = [
    "ComplierEffect",
    "complier_effect",
    "DEFAULT_MAX_GAP_S",
    "DEFAULT_MAX_SPEED_KMH",
    "DEFAULT_MIN_MINUTES",
    "DEFAULT_TOLERANCE_M",
    "FREQUENCIES",
    "DeliveryWeek",
    "Dosage",
    "RECORD_LAYER",
    "delivery_week",
    "plot_weekly_delivery",
    "weekly_delivery",
    "StayBuilder",
    "StayRules",
    "StayTable",
    "UnitIndex",
    "read_visits",
    "rest_steps",
    "snap_points",
    "stay_bounds",
    "stays_from_pings",
    "treatment_received",
    "received_inputs",
    "dose_response_table",
    "plot_dose_response",
    "PreTrend",
    "condition_series",
    "incidents_by_period",
    "plot_over_time",
    "pre_trend",
    "unit_index",
    "MULTIPLICITY_NOTE",
    "PeriodEffects",
    "effects_by_period",
    "holm",
    "period_effects",
    "plot_period_effects",
]
