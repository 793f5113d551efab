"""Reporting periods and the drop report: which incidents were counted, and why others were not.

Periods are closed intervals of calendar dates, ``[start, end]``, both days
included. Every incident is counted once or dropped for exactly one reason
(:data:`REASONS`, in the order they are checked); incidents of types not asked
for are set aside on purpose (:data:`SET_ASIDE`), not dropped.
"""

from __future__ import annotations

import datetime as dt
import re
from dataclasses import dataclass
from typing import Literal

import numpy as np
import pandas as pd

from geoexp.errors import InputError

Period = tuple[object, object]
DateFormat = Literal["iso", "dmy", "mdy"] | str

# Reason codes, in the order they are checked; 0 means counted.
REASONS = (
    "missing coordinates",
    "missing date",
    "unparseable date",
    "outside periods",
    "outside tolerance",
)
# Not a drop reason: incidents of types not asked for (keep_types) are left out on purpose.
SET_ASIDE = "other incident type"
_SET_ASIDE = len(REASONS) + 1  # its code
_FIELDS = tuple(r.replace(" ", "_") for r in REASONS)
UNTYPED = "untyped"
_LAYER = "outcomes"
# Above this share of dropped incidents counting stops with an error (see count_incidents).
MAX_DROPPED_SHARE = 0.5
_META_PREFIX = "outcomes_"


# --------------------------------------------------------------------- periods


def _as_date(value: object, what: str) -> dt.date:
    if isinstance(value, dt.datetime):
        return value.date()
    if isinstance(value, dt.date):
        return value
    if isinstance(value, np.datetime64) and not np.isnat(value):
        return pd.Timestamp(value).date()
    if isinstance(value, str) and re.fullmatch(r"\s*\d{4}-\d{2}-\d{2}\s*", value):
        try:
            return dt.date.fromisoformat(value.strip())
        except ValueError as err:
            raise InputError(f"{what}: {value!r} is not a calendar date ({err})") from None
    raise InputError(
        f"{what}: {value!r} is not a date; give dates as 'YYYY-MM-DD' text or datetime.date"
    )


def parse_period(period: Period, name: str) -> tuple[dt.date, dt.date]:
    """Check one ``(start, end)`` period and return it as two ``datetime.date``."""
    if isinstance(period, str) or not hasattr(period, "__len__") or len(period) != 2:
        raise InputError(
            f"{name}= must be a (start, end) pair of dates, e.g. ('2024-01-01', '2024-12-31'); "
            f"got {period!r}"
        )
    start = _as_date(period[0], f"the start of {name}=")
    end = _as_date(period[1], f"the end of {name}=")
    if end < start:
        raise InputError(f"{name}= ends ({end}) before it starts ({start})")
    return start, end


def parse_periods(
    pre: Period, post: Period
) -> tuple[tuple[dt.date, dt.date], tuple[dt.date, dt.date]]:
    """Check both periods: each well formed, no day shared, the post-period after the pre."""
    pre_d, post_d = parse_period(pre, "pre"), parse_period(post, "post")
    if pre_d[0] <= post_d[1] and post_d[0] <= pre_d[1]:
        shared_from, shared_to = max(pre_d[0], post_d[0]), min(pre_d[1], post_d[1])
        raise InputError(
            f"the periods overlap: pre {pre_d[0]} to {pre_d[1]} and post {post_d[0]} to "
            f"{post_d[1]} share {shared_from} to {shared_to} (both ends are included); an "
            "incident on those days would belong to both"
        )
    if post_d[0] < pre_d[0]:
        raise InputError(
            f"the post-period ({post_d[0]} to {post_d[1]}) comes before the pre-period "
            f"({pre_d[0]} to {pre_d[1]}); did you swap pre= and post=?"
        )
    return pre_d, post_d


def _days(period: tuple[dt.date, dt.date]) -> int:
    return (period[1] - period[0]).days + 1


# ----------------------------------------------------------------- drop report


@dataclass(frozen=True)
class DropReport:
    """What happened to every incident: counted, or dropped and why.

    Attributes
    ----------
    n_incidents : int
        Rows read.
    missing_coordinates, missing_date, unparseable_date, outside_periods, outside_tolerance : int
        Incidents dropped for each reason (each incident for the first reason
        that applies, in this order).
    ties : int
        Counted incidents whose nearest distance was shared by two or more
        units; each went to the tied unit with the smallest id.
    tolerance_m : float or None
        Snapping tolerance in metres (None for a ready table of counts).
    source : str
        Where the incidents came from.
    dropped_path : str or None
        The CSV of dropped rows, if one was written.
    """

    n_incidents: int
    missing_coordinates: int = 0
    missing_date: int = 0
    unparseable_date: int = 0
    outside_periods: int = 0
    outside_tolerance: int = 0
    other_incident_type: int = 0
    ties: int = 0
    tolerance_m: float | None = None
    source: str = ""
    dropped_path: str | None = None
    max_dropped_share: float | None = MAX_DROPPED_SHARE

    def counts(self) -> dict[str, int]:
        """Dropped incidents by reason (plain-words keys, as in the side file)."""
        return {r: int(getattr(self, f)) for r, f in zip(REASONS, _FIELDS, strict=True)}

    @property
    def n_dropped(self) -> int:
        """Incidents dropped, all reasons together (types left out on purpose are not drops)."""
        return sum(self.counts().values())

    @property
    def n_counted(self) -> int:
        """Incidents counted on a unit in one of the periods."""
        return self.n_incidents - self.n_dropped - self.other_incident_type

    def to_frame(self) -> pd.DataFrame:
        """One row per reason with the number of incidents dropped for it."""
        frame = pd.DataFrame({"reason": list(REASONS), "incidents": list(self.counts().values())})
        return frame.set_index("reason")

    def __str__(self) -> str:
        tol = "the tolerance" if self.tolerance_m is None else f"{self.tolerance_m:g} m"
        words = {
            "missing coordinates": "had no usable coordinates",
            "missing date": "had no date",
            "unparseable date": "had a date that could not be read",
            "outside periods": "had a date outside both periods",
            "outside tolerance": f"lay more than {tol} from every unit",
        }
        where = f" from '{self.source}'" if self.source else ""
        text = (
            f"Of {self.n_incidents:,} incident{'' if self.n_incidents == 1 else 's'}{where}, {self.n_counted:,} were counted and "
            f"{self.n_dropped:,} dropped"
        )
        if self.other_incident_type:
            text += f" ({self.other_incident_type:,} more were of other types, left out on purpose)"
        parts = [f"{n:,} {words[r]} ({r})" for r, n in self.counts().items() if n]
        text += (": " + "; ".join(parts) + ".") if parts else "."
        if self.ties:
            who = "incident was" if self.ties == 1 else "incidents were"
            text += (
                f" {self.ties:,} counted {who} equally near two or more units and went to the "
                "one with the smallest id."
            )
        if self.outside_tolerance and self.n_counted == 0:
            text += (
                " No incident was near any unit: check that the incidents' CRS (crs=, or "
                "x/y against lon/lat) is right."
            )
        if self.max_dropped_share is None:
            text += " No limit was set on the share of incidents dropped."
        elif self.max_dropped_share != MAX_DROPPED_SHARE:
            text += (
                f" The limit on dropped incidents was set to {self.max_dropped_share:.0%} "
                f"(default {MAX_DROPPED_SHARE:.0%}) on purpose."
            )
        if self.dropped_path:
            text += f" The dropped rows, with a 'reason' column, are in '{self.dropped_path}'."
        return text
