"""Stays (from pings or visit logs) and the dose they give each unit per period."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import pandas as pd

from geoexp.errors import InputError

Frequency = Literal["day", "week", "period"]
FREQUENCIES = ("day", "week", "period")
STAY_COLUMNS = ("unit", "start", "end", "minutes", "device", "activity")


@dataclass(frozen=True, eq=False)
class StayTable:
    """Presence at units: one row per stay (from GPS pings) or per logged visit.

    Attributes
    ----------
    frame : pandas.DataFrame
        Columns ``unit`` (the unit's id), ``start`` and ``end``
        (datetime64[s], local clock), ``minutes`` (float, minutes present),
        ``device`` (device id or team; may be missing) and ``activity``
        (missing for pings). Treat it as read-only.
    unit_ids : pandas.Index
        Every unit of the trial, so that doses can be reported as zero.
    source : str
        The file the stays came from.
    summary : dict
        Counts of what was read (``pings``, ``pings_without_position``,
        ``pings_snapped``, ``devices`` for pings; ``rows`` for logs) and the
        rules used.
    """

    frame: pd.DataFrame
    unit_ids: pd.Index
    source: str
    summary: dict = field(default_factory=dict)

    def __len__(self) -> int:
        return len(self.frame)

    def __str__(self) -> str:
        parts = [
            f"{len(self):,} stays at {self.frame['unit'].nunique():,} units from {self.source}"
        ]
        parts += [f"  {k.replace('_', ' ')}: {v}" for k, v in self.summary.items()]
        if len(self):
            parts.append(
                f"  minutes present: {self.frame['minutes'].sum():,.0f} min in total; "
                f"median stay {self.frame['minutes'].median():.1f} min"
            )
        return "\n".join(parts)

    def dosage(
        self, freq: Frequency = "week", *, start: str | None = None, end: str | None = None
    ) -> Dosage:
        """Minutes present and visits per unit and period.

        A stay counts wholly in the period in which it starts (a stay that
        crosses midnight is not split); stays starting outside ``[start, end]``
        (dates, both included) are left out.

        Parameters
        ----------
        freq : {"day", "week", "period"}
            Calendar days, ISO weeks (starting on Monday) or the whole window.
        start, end : str, optional
            First and last day of the window (ISO dates); default: the stays' span.

        Returns
        -------
        Dosage
        """
        if freq not in FREQUENCIES:
            raise InputError(f"freq must be one of {', '.join(FREQUENCIES)}, got {freq!r}")
        frame = self.frame
        day = frame["start"].to_numpy().astype("datetime64[D]")
        lo = _day(start, "start") if start is not None else (day.min() if len(day) else None)
        hi = _day(end, "end") if end is not None else (day.max() if len(day) else None)
        if lo is not None and hi is not None and hi < lo:
            raise InputError(f"the window ends ({hi}) before it starts ({lo})")
        keep = np.ones(len(day), dtype=bool)
        if lo is not None:
            keep &= (day >= lo) & (day <= hi)
        day = day[keep]
        if freq == "day":
            period = day
        elif freq == "week":
            # 1970-01-01 was a Thursday: day number + 3 counts from a Monday.
            n = day.astype(np.int64)
            period = (n - (n + 3) % 7).astype("datetime64[D]")
        else:
            period = np.full(
                len(day), lo if lo is not None else np.datetime64("NaT"), "datetime64[D]"
            )
        table = (
            pd.DataFrame(
                {
                    "unit": frame["unit"].to_numpy()[keep],
                    "period": period,
                    "minutes": frame["minutes"].to_numpy()[keep],
                }
            )
            .groupby(["unit", "period"], sort=True)["minutes"]
            .agg(minutes="sum", visits="size")
            .reset_index()
        )
        return Dosage(table, self.unit_ids, freq, lo, hi)


def _day(text: str, what: str) -> np.datetime64:
    try:
        return np.datetime64(str(text), "D")
    except ValueError:
        raise InputError(f"{what} must be an ISO date such as 2025-03-01, got {text!r}") from None


@dataclass(frozen=True, eq=False)
class Dosage:
    """Minutes present and visit counts per unit and period.

    Attributes
    ----------
    frame : pandas.DataFrame
        Long table: ``unit``, ``period`` (first day of the day, ISO week or
        window), ``minutes`` (minutes present) and ``visits`` (stays); only
        unit-periods with presence have a row.
    unit_ids : pandas.Index
        Every unit, for tables with zeros.
    freq : {"day", "week", "period"}
    first_day, last_day : numpy.datetime64 or None
        The window.
    """

    frame: pd.DataFrame
    unit_ids: pd.Index
    freq: str
    first_day: np.datetime64 | None
    last_day: np.datetime64 | None

    def wide(self, value: Literal["minutes", "visits"] = "minutes") -> pd.DataFrame:
        """Units (rows, every unit, zeros included) by periods (columns)."""
        if value not in ("minutes", "visits"):
            raise InputError(f"value must be 'minutes' or 'visits', got {value!r}")
        table = self.frame.pivot(index="unit", columns="period", values=value)
        table = table.reindex(self.unit_ids).fillna(0)
        table.index.name = self.unit_ids.name
        return table.astype(np.int64) if value == "visits" else table

    def per_unit(self) -> pd.DataFrame:
        """Total minutes present and visits per unit over the window (every unit)."""
        total = self.frame.groupby("unit")[["minutes", "visits"]].sum()
        total = total.reindex(self.unit_ids).fillna(0)
        total.index.name = self.unit_ids.name
        return total.astype({"visits": np.int64})
