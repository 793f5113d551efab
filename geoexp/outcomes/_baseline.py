"""Counts before any trial: incidents per unit over one period (or all time), as a new column.

A design ranks its hot spots by a count column of the units layer
(``[eligible] top_column``); this module makes that column from incident
points, with no trial file and, if need be, no dates. Each incident is
snapped to the nearest unit within the tolerance (ties to the smallest id),
exactly as the trial's own counts are; it is counted when it is dated within
the period (both days included) or when no period is asked for, and, with a
type filter, when its type is one of those asked for. The layer is written
back as it was read, in its own CRS (or none, for a layer declared planar),
with the count column added, so that a spec can name the written file.
"""

from __future__ import annotations

import os
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from geoexp._atomic import atomic_path
from geoexp.errors import InputError
from geoexp.outcomes._drops import _FIELDS, MAX_DROPPED_SHARE, REASONS, DropReport, parse_period
from geoexp.outcomes._read import DATE_MISSING, DATE_UNPARSEABLE, read_incidents
from geoexp.outcomes._snap import checked_tolerance, snap_to_units
from geoexp.units import ROW_ID, UnitSet, read_layer

__all__ = ["BaselineCounts", "count_onto_units", "write_counted_layer"]


@dataclass(frozen=True, eq=False)
class BaselineCounts:
    """Incidents counted per unit for one period (or all time), before any trial.

    Attributes
    ----------
    counts : pandas.Series
        int64 counts indexed by unit id, named after the new column.
    period : (datetime.date, datetime.date) or None
        The days counted (both included); None when every dated or undated
        incident counts.
    types : tuple of str
        The incident types counted; empty when every type counts.
    other_types : int
        Incidents of other types, left out by the type filter (not dropped).
    drops : DropReport
        What happened to the other incidents, by reason.
    """

    counts: pd.Series
    period: tuple | None
    types: tuple[str, ...]
    other_types: int
    drops: DropReport

    @property
    def column(self) -> str:
        """Name of the count column."""
        return str(self.counts.name)

    def __str__(self) -> str:
        when = (
            f"dated {self.period[0]} to {self.period[1]} (both days included)"
            if self.period
            else "over all time (dates not read)"
        )
        what = f" of type {', '.join(self.types)}" if self.types else ""
        text = (
            f"Counted {int(self.counts.sum()):,} incidents{what} {when} onto "
            f"{len(self.counts):,} units as column {self.column!r}; "
            f"{int((self.counts > 0).sum()):,} units have at least one."
        )
        if self.other_types:
            text += f" {self.other_types:,} incidents of other types were left out."
        drops = str(self.drops).replace("outside both periods", "outside the period")
        return f"{text}\n{drops}"


def count_onto_units(
    units: UnitSet,
    incidents: str | os.PathLike | pd.DataFrame,
    *,
    column: str,
    tolerance_m: float,
    date_column: str | None = None,
    period: tuple | None = None,
    type_column: str | None = None,
    types: tuple[str, ...] | list[str] = (),
    x: str | None = None,
    y: str | None = None,
    lon: str | None = None,
    lat: str | None = None,
    crs: object = None,
    date_format: str | None = None,
    layer: str | None = None,
    max_dropped_share: float | None = MAX_DROPPED_SHARE,
) -> BaselineCounts:
    """Count incidents onto units for one period, or over all time without dates.

    Parameters
    ----------
    units : UnitSet
        The units layer (the one a design spec will name).
    incidents : path, GeoDataFrame or DataFrame
        As in :func:`count_incidents`.
    column : str
        Name of the new count column; must not be a column of the layer.
    tolerance_m : float
        Snapping tolerance in metres (>= 0).
    date_column : str, optional
        Column of incident dates; needed with ``period``. Without it the
        incidents are undated and all of them count.
    period : (start, end), optional
        Days to count, both included (``"YYYY-MM-DD"`` or dates).
    type_column : str, optional
        Column of incident types; needed with ``types``.
    types : sequence of str
        Count only incidents of these types (text as written, spaces trimmed).
    x, y, lon, lat, crs, date_format, layer
        As in :func:`count_incidents`; ``crs="planar"`` for x/y in the units'
        own local planar coordinates.
    max_dropped_share : float or None
        Counting stops with an error when more than this share of incidents
        (of the types asked for) is dropped, or when none is counted; None
        turns the stop off.

    Returns
    -------
    BaselineCounts
    """
    if not isinstance(column, str) or not column.strip():
        raise InputError(f"the count column needs a name, got {column!r}")
    taken = [str(c) for c in units.frame.columns] + [str(units.id_column)]
    if column in taken or column == "geometry":
        raise InputError(
            f"'{units.source}' already has a column {column!r}; name the count column otherwise "
            "(geoexp does not overwrite a column of the layer)"
        )
    if period is not None and date_column is None:
        raise InputError("a period needs the column of incident dates (date_column=)")
    if types and type_column is None:
        raise InputError("counting only some incident types needs type_column=")
    tolerance = checked_tolerance(tolerance_m)
    days = None if period is None else parse_period(period, "period")
    rows = read_incidents(
        incidents,
        units.crs,
        date_column=date_column if period is not None else None,
        type_column=type_column,
        x=x,
        y=y,
        lon=lon,
        lat=lat,
        crs=crs,
        date_format=date_format,
        layer=layer,
    )
    wanted = np.ones(rows.n, dtype=bool)
    wanted_types: tuple[str, ...] = ()
    if types:
        wanted_types = tuple(str(t).strip() for t in types)
        labels = pd.Series(rows.types, dtype=object)
        wanted = labels.isin(wanted_types).to_numpy(dtype=bool)
        found = set(labels.dropna())
        absent = [t for t in wanted_types if t not in found]
        if absent:
            raise InputError(
                f"no incident in '{rows.source}' has type {', '.join(repr(t) for t in absent)} "
                f"in column {type_column!r}; its types are "
                f"{', '.join(repr(t) for t in sorted(found)[:20]) or 'none'}"
            )
    reason = np.zeros(rows.n, dtype=np.int8)
    if days is not None:
        inside = (rows.dates >= np.datetime64(days[0])) & (rows.dates <= np.datetime64(days[1]))
        reason[~inside] = 4
        reason[rows.date_problem == DATE_UNPARSEABLE] = 3
        reason[rows.date_problem == DATE_MISSING] = 2
    reason[~(np.isfinite(rows.x) & np.isfinite(rows.y))] = 1
    candidates = np.flatnonzero((reason == 0) & wanted)
    snapped = snap_to_units(rows.x[candidates], rows.y[candidates], units, tolerance)
    reason[candidates[snapped.unit < 0]] = 5
    counted_units = snapped.unit[snapped.unit >= 0]
    counts = pd.Series(
        np.bincount(counted_units, minlength=units.n).astype(np.int64),
        index=units.ids,
        name=column,
    )
    per_reason = np.bincount(reason[wanted], minlength=len(REASONS) + 1)[1:]
    n_wanted = int(wanted.sum())
    dropped: dict[str, Any] = {f: int(n) for f, n in zip(_FIELDS, per_reason, strict=True)}
    drops = DropReport(
        n_incidents=n_wanted,
        **dropped,
        ties=int(snapped.tied[snapped.unit >= 0].sum()),
        tolerance_m=tolerance,
        source=rows.source,
        max_dropped_share=None if max_dropped_share is None else float(max_dropped_share),
    )
    if max_dropped_share is not None:
        if n_wanted == 0:
            raise InputError(f"the incidents '{rows.source}' hold no incidents to count")
        # Incidents dated outside the period are expected (an extract of several
        # years counted for one); only the other reasons count against the limit.
        failed = drops.n_dropped - drops.outside_periods
        if drops.n_counted == 0 or failed / n_wanted > max_dropped_share:
            raise InputError(
                f"{failed:,} of {n_wanted:,} incidents in '{rows.source}' could not be "
                f"counted (limit {max_dropped_share:.0%}): {drops} Check the coordinate columns, "
                "the CRS, the tolerance and the period; raise the limit knowingly "
                "(max_dropped_share=, on the command line --allow-dropped)."
            )
    return BaselineCounts(counts, days, wanted_types, int((~wanted).sum()), drops)


def write_counted_layer(
    units: UnitSet,
    counts: BaselineCounts,
    path: str | os.PathLike,
    *,
    source_layer: str | None = None,
    out_layer: str | None = None,
) -> Path:
    """Write the units layer as it was read, with the count column added.

    A GeoPackage (``.gpkg``) keeps the geometry in the layer's own CRS (none
    for a layer declared planar); a ``.csv`` holds the unit id and the count.
    Units numbered in file order keep their numbers: the written layer has
    the same features in the same order.

    Parameters
    ----------
    units : UnitSet
        The units the counts were made on, read from ``units.source``.
    counts : BaselineCounts
        The counts per unit; their column name becomes the new column.
    path : path
        ``.gpkg`` or ``.csv``.
    source_layer : str, optional
        Layer of ``units.source`` the units were read from.
    out_layer : str, optional
        Layer name in the written GeoPackage (default: the source layer's
        name, or the file's stem).

    Returns
    -------
    pathlib.Path
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in (".gpkg", ".csv"):
        raise InputError(f"write the counted layer as .gpkg or .csv, not '{path.name}'")
    if suffix == ".csv":
        table = counts.counts.rename_axis(units.id_column).reset_index()
        with atomic_path(path) as tmp:
            table.to_csv(tmp, index=False, encoding="utf-8")
        return path
    original = read_layer(units.source, source_layer, "units")
    if len(original) != units.n:
        raise InputError(
            f"'{units.source}' now has {len(original):,} features, not the {units.n:,} counted; "
            "count again"
        )
    # The units keep the layer's feature order, so the counts go back by position;
    # the ids are compared as text (a shapefile may store integer ids as decimals).
    if units.id_column != ROW_ID:
        written = pd.Series(original[units.id_column]).astype(str).str.removesuffix(".0")
        if not np.array_equal(written.to_numpy(), units.ids.astype(str).to_numpy()):
            raise InputError(
                f"the ids of '{units.source}' no longer match the units counted; count again"
            )
    values = counts.counts.reindex(units.ids)
    out = original.copy()
    out[counts.column] = values.to_numpy(dtype=np.int64)
    name = out_layer or source_layer or path.stem
    with atomic_path(path) as tmp, warnings.catch_warnings():
        # a layer declared planar has no CRS on purpose; pyogrio warns about it
        warnings.filterwarnings("ignore", message="'crs' was not provided")
        out.to_file(tmp, layer=name, driver="GPKG", engine="pyogrio")
    return path
