"""Outcome tables: incident counts per unit for a pre-period and a post-period.

Every incident either is counted once (in one period, on one unit) or is
dropped for exactly one reason, checked in this order:

1. ``missing coordinates`` -- no usable coordinates;
2. ``missing date`` -- the date cell is empty;
3. ``unparseable date`` -- the date cannot be read;
4. ``outside periods`` -- the date is in neither period;
5. ``outside tolerance`` -- no unit lies within the snapping tolerance.

When only some incident types are counted (``keep_types``), an incident of
another type is set aside as ``other incident type`` before any of these; such
incidents are left out on purpose and do not count towards the share of
incidents dropped by mistake. So counted plus dropped (or set aside) always
equals the number of input rows. Periods are
closed intervals of calendar dates, ``[start, end]``, both days included.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import shapely

from geoexp._atomic import atomic_path
from geoexp.errors import InputError, describe_rows
from geoexp.outcomes._drops import (
    _FIELDS,
    _LAYER,
    _SET_ASIDE,
    MAX_DROPPED_SHARE,
    REASONS,
    SET_ASIDE,
    UNTYPED,
    DateFormat,
    DropReport,
    Period,
    _days,
    parse_periods,
)
from geoexp.outcomes._read import DATE_MISSING, DATE_UNPARSEABLE, IncidentRows, read_incidents
from geoexp.outcomes._snap import checked_tolerance, snap_to_units
from geoexp.postgis import DatabaseSource
from geoexp.trialfile import TrialFile
from geoexp.units import UnitSet

# ---------------------------------------------------------------- the table


def _type_column_names(types: tuple[str, ...]) -> dict[str, str]:
    # Column-safe names: "theft from vehicle" -> "theft_from_vehicle".
    names: dict[str, str] = {}
    for label in types:
        slug = re.sub(r"[^0-9a-z]+", "_", label.lower()).strip("_")
        if not slug:
            raise InputError(f"incident type {label!r} has no letters or digits to name a column")
        clash = [k for k, v in names.items() if v == slug]
        if clash:
            raise InputError(
                f"incident types {clash[0]!r} and {label!r} would share the column name "
                f"{slug!r}; rename one of them"
            )
        names[label] = slug
    return names


@dataclass(frozen=True, eq=False)
class OutcomeTable:
    """Incident counts per unit for a pre-period and a post-period.

    Build one with :func:`count_incidents`, :meth:`from_counts` or
    :func:`load_outcomes`; the constructor itself does no checking.

    Attributes
    ----------
    counts : pandas.DataFrame
        Indexed by unit id over all units of the layer (zero counts
        included); int64 columns ``pre`` and ``post``, and with incident
        types ``pre__<type>`` and ``post__<type>`` (see :attr:`type_columns`).
        Treat it as read-only.
    pre, post : tuple of datetime.date
        The periods ``(start, end)``, both days included.
    tolerance_m : float or None
        Snapping tolerance in metres (None for a ready table of counts).
    drops : DropReport
        What was dropped and why.
    types : tuple of str
        Incident types with their own columns, in column order.
    source : str
        Where the incidents or counts came from.
    type_column : str or None
        The incidents' column of types, if one was given.
    kept_types : tuple of str
        When only some incident types were counted, those types (else empty).
    """

    counts: pd.DataFrame
    pre: tuple[dt.date, dt.date]
    post: tuple[dt.date, dt.date]
    tolerance_m: float | None
    drops: DropReport
    types: tuple[str, ...] = ()
    source: str = ""
    type_column: str | None = None
    kept_types: tuple[str, ...] = ()

    @classmethod
    def from_counts(
        cls,
        frame: pd.DataFrame,
        id_column: str | None,
        *,
        units: UnitSet | TrialFile,
        pre: Period,
        post: Period,
        pre_column: str = "pre",
        post_column: str = "post",
        fill_missing: bool = False,
        source: str = "<counts table>",
    ) -> OutcomeTable:
        """Take a ready table of counts per unit and period (e.g. from a records system).

        Parameters
        ----------
        frame : pandas.DataFrame
            One row per unit. Per-type counts may come as columns
            ``<pre_column>__<type>`` and ``<post_column>__<type>`` (both needed).
        id_column : str or None
            Column of unit ids; ``None`` uses the frame's index.
        units : UnitSet or TrialFile
            The trial's units; every id must be one of theirs.
        pre, post : (start, end)
            The periods the counts cover, both days included.
        pre_column, post_column : str
            Count columns of the two periods.
        fill_missing : bool
            Units absent from the table get zero counts. By default their
            absence is an error, because a forgotten unit is not a unit with
            no incidents.
        source : str
            Name used in messages and reports.

        Returns
        -------
        OutcomeTable

        Raises
        ------
        geoexp.errors.InputError
            Unknown, repeated or missing ids (named), missing columns, or
            counts that are not whole numbers >= 0.
        """
        units = _as_units(units)
        pre_d, post_d = parse_periods(pre, post)
        label = f"the counts '{source}'"
        if id_column is not None and id_column not in frame.columns:
            raise InputError(
                f"{label} have no id column {id_column!r}; its columns are {list(frame.columns)}"
            )
        table = frame if id_column is None else frame.set_index(id_column)
        for col in (pre_column, post_column):
            if col not in table.columns:
                raise InputError(
                    f"{label} have no column {col!r}; their columns are "
                    f"{', '.join(repr(str(c)) for c in table.columns)}"
                )
        pre_types = [
            c[len(pre_column) + 2 :] for c in table.columns if str(c).startswith(f"{pre_column}__")
        ]
        post_types = [
            c[len(post_column) + 2 :]
            for c in table.columns
            if str(c).startswith(f"{post_column}__")
        ]
        if set(pre_types) != set(post_types):
            odd = sorted(set(pre_types) ^ set(post_types))
            raise InputError(f"{label}: types {describe_rows(odd)} have counts for only one period")
        types = tuple(pre_types)
        names = _type_column_names(types)

        ids = table.index
        repeated = ids[ids.duplicated()]
        if len(repeated):
            raise InputError(
                f"{label} list ids more than once: {describe_rows(pd.unique(repeated))}"
            )
        unknown = ids[~ids.isin(units.ids)]
        if len(unknown):
            hint = ""
            if ids.dtype.kind != units.ids.dtype.kind:
                hint = f" (the table's ids are {ids.dtype}, the units' ids {units.ids.dtype})"
            raise InputError(
                f"{len(unknown):,} ids in {label} are not units of '{units.source}'{hint}: "
                f"{describe_rows(list(unknown))}"
            )
        absent = units.ids[~units.ids.isin(ids)]
        if len(absent) and not fill_missing:
            raise InputError(
                f"{len(absent):,} units of '{units.source}' are not in {label}: "
                f"{describe_rows(list(absent))}; add them, or pass fill_missing=True to count "
                "them as zero"
            )

        sources = {"pre": pre_column, "post": post_column}
        for period, col in (("pre", pre_column), ("post", post_column)):
            for t in types:
                sources[f"{period}__{names[t]}"] = f"{col}__{t}"
        data = {}
        for name, col in sources.items():
            values = pd.to_numeric(table[col], errors="coerce")
            arr = values.to_numpy(dtype=np.float64, na_value=np.nan)
            bad = ~np.isfinite(arr) | (arr < 0) | (np.floor(arr) != arr)
            if bad.any():
                raise InputError(
                    f"column {col!r} of {label} must hold whole numbers >= 0; it does not for "
                    f"ids {describe_rows(list(ids[bad]))}"
                )
            data[name] = pd.Series(arr.astype(np.int64), index=ids)
        counts = pd.DataFrame(data).reindex(units.ids, fill_value=0)
        counts.index.name = units.id_column
        drops = DropReport(
            n_incidents=int(counts["pre"].sum() + counts["post"].sum()), source=source
        )
        return cls(counts, pre_d, post_d, None, drops, types, source)

    # ------------------------------------------------------------ properties
    @property
    def ids(self) -> pd.Index:
        """Unit ids, in the units' order."""
        return self.counts.index

    @property
    def days_pre(self) -> int:
        """Length of the pre-period in days, both ends included."""
        return _days(self.pre)

    @property
    def days_post(self) -> int:
        """Length of the post-period in days, both ends included."""
        return _days(self.post)

    @property
    def change(self) -> pd.Series:
        """Post-period count minus pre-period count, per unit."""
        return (self.counts["post"] - self.counts["pre"]).rename("change")

    @property
    def type_columns(self) -> dict[str, tuple[str, str]]:
        """For each incident type, its (pre, post) column names."""
        names = _type_column_names(self.types)
        return {t: (f"pre__{names[t]}", f"post__{names[t]}") for t in self.types}

    def to_frame(self) -> pd.DataFrame:
        """A copy of the counts with a ``change`` column (post minus pre)."""
        out = self.counts.copy()
        out.insert(2, "change", self.change)
        return out

    def __str__(self) -> str:
        lines = [
            f"Incident counts for {len(self.counts):,} units:",
            f"  pre  {self.pre[0]} to {self.pre[1]} ({self.days_pre} days): "
            f"{int(self.counts['pre'].sum()):,} incidents",
            f"  post {self.post[0]} to {self.post[1]} ({self.days_post} days): "
            f"{int(self.counts['post'].sum()):,} incidents",
        ]
        if self.tolerance_m is not None:
            lines.append(
                f"  each incident snapped to the nearest unit within {self.tolerance_m:g} m"
            )
        if self.kept_types:
            lines.append(
                f"  only incident types {', '.join(self.kept_types)} (column "
                f"{self.type_column!r}) counted; other types were left out"
            )
        if self.types:
            lines.append(
                f"  by type (column {self.type_column!r}), pre and post incidents:"
                if self.type_column
                else "  by type, pre and post incidents:"
            )
            for label, (pre_col, post_col) in self.type_columns.items():
                lines.append(
                    f"    {label}: {int(self.counts[pre_col].sum()):,} pre, "
                    f"{int(self.counts[post_col].sum()):,} post"
                )
        lines.append("  " + str(self.drops))
        return "\n".join(lines)


# --------------------------------------------------------------- counting


def _as_units(units: UnitSet | TrialFile) -> UnitSet:
    if isinstance(units, UnitSet):
        return units
    if isinstance(units, TrialFile):
        return UnitSet.from_frame(units.units(), None, source=str(units.path))
    raise InputError(f"units must be a geoexp UnitSet or TrialFile, not {type(units).__name__}")


def count_incidents(
    units: UnitSet | TrialFile,
    incidents: str | os.PathLike | pd.DataFrame | DatabaseSource,
    *,
    date_column: str,
    tolerance_m: float,
    pre: Period,
    post: Period,
    type_column: str | None = None,
    by_type: bool = False,
    keep_types: Sequence[str] | None = None,
    x: str | None = None,
    y: str | None = None,
    lon: str | None = None,
    lat: str | None = None,
    crs: object = None,
    date_format: DateFormat | None = None,
    layer: str | None = None,
    dropped_path: str | os.PathLike | None = None,
    max_dropped_share: float | None = MAX_DROPPED_SHARE,
) -> OutcomeTable:
    """Count incidents per unit in a pre-period and a post-period.

    Each incident is snapped to the nearest unit within ``tolerance_m`` metres
    (ties go to the smallest unit id) and counted in the period its date falls
    in. Incidents that cannot be counted are dropped for one named reason
    (see the module notes) and reported.

    Parameters
    ----------
    units : UnitSet or TrialFile
        The trial's units; incidents are reprojected to their CRS, and the
        tolerance is converted with their ``metres_per_unit`` (feet CRSs).
    incidents : path, URL, DatabaseSource, GeoDataFrame or DataFrame
        A CSV (x/y or lon/lat columns), a point layer (GeoPackage, GeoJSON,
        Shapefile), a PostGIS table or query (a ``postgresql://`` URL with
        ``?table=`` or ``?query=``, the table given as ``layer``, or a
        :class:`geoexp.postgis.DatabaseSource`) or a frame.
    date_column : str
        Column of incident dates.
    tolerance_m : float
        Snapping tolerance in metres (>= 0); 30 m is a common choice for
        street segments (common practice).
    pre, post : (start, end)
        The periods as dates (``"YYYY-MM-DD"`` or ``datetime.date``), both
        days included; they must not overlap, and post must follow pre.
    type_column : str, optional
        Column of incident types.
    by_type : bool
        Also count each type (columns ``pre__<type>``, ``post__<type>``;
        incidents without a type count as ``untyped``).
    keep_types : sequence of str, optional
        Count only incidents of these types (as written in ``type_column``,
        which it needs); the others are set aside as ``other incident type``
        and reported, and the choice is stored with the outcomes. A type that
        no incident has is an error (a misspelt type would count nothing).
    x, y : str, optional
        Projected coordinate columns, in ``crs``.
    lon, lat : str, optional
        Longitude/latitude columns in EPSG:4326.
    crs : optional
        CRS of ``x``/``y`` (required with them), or of a layer without one.
    date_format : {"iso", "dmy", "mdy"} or str, optional
        How dates written as text are read; default ISO 8601 only. Day/month
        text without it raises an error rather than being guessed.
    layer : str, optional
        Layer of a multi-layer incidents file (or table of a database URL).
    dropped_path : path, optional
        Write the dropped rows here as CSV, with a ``reason`` column.
    max_dropped_share : float or None
        Largest share of incidents that may be dropped, in [0, 1]; default
        0.5. When more are dropped the counts are not a picture of the
        incidents but of a mistake in reading them (longitude and latitude
        swapped, a wrong CRS, the wrong date format or periods), and an
        analysis of such counts would report "no effect" with confidence.
        Half is a generous limit: in a correct extract, incidents far from
        every unit or outside both periods are the exception. Raise it
        knowingly (it is recorded in the drop report) when, for example,
        the extract covers a whole city and the trial only a district.
        With any number, counting also stops when no incident at all is
        counted or when a period holds no incident. ``None`` turns every
        stop off: the caller must then read the drop report itself.

    Returns
    -------
    OutcomeTable

    Raises
    ------
    geoexp.errors.InputError
        Bad periods, missing columns, day/month dates without
        ``date_format``, a date column with no readable date; no incident
        counted at all; a period with no incident dated in it; more than
        ``max_dropped_share`` of the incidents dropped. These are raised
        before anything (the dropped rows' CSV) is written, and say how many
        incidents were read, how many were dropped for each reason and the
        likely cause.
    geoexp.errors.CRSError
        Coordinates without a CRS, or a CRS that contradicts the layer.
    geoexp.errors.GeometryError
        Incident geometry that is not points.
    """
    units = _as_units(units)
    pre_d, post_d = parse_periods(pre, post)
    if max_dropped_share is not None and (
        isinstance(max_dropped_share, bool)
        or not (
            isinstance(max_dropped_share, (int, float, np.integer, np.floating))
            and 0 <= max_dropped_share <= 1
        )
    ):
        raise InputError(
            f"max_dropped_share must be a share between 0 and 1, got {max_dropped_share!r}"
        )
    tolerance = checked_tolerance(tolerance_m)
    if by_type and type_column is None:
        raise InputError("by_type=True needs type_column=, the column of incident types")
    if keep_types is not None:
        if type_column is None:
            raise InputError("keep_types= needs type_column=, the column of incident types")
        keep_types = tuple(dict.fromkeys(str(t) for t in keep_types))
        if not keep_types:
            raise InputError("keep_types= names no incident type")
    rows = read_incidents(
        incidents,
        units.crs,
        date_column=date_column,
        type_column=type_column,
        x=x,
        y=y,
        lon=lon,
        lat=lat,
        crs=crs,
        date_format=date_format,
        layer=layer,
    )

    reason = np.zeros(rows.n, dtype=np.int8)
    located = np.isfinite(rows.x) & np.isfinite(rows.y)
    in_pre = (rows.dates >= np.datetime64(pre_d[0])) & (rows.dates <= np.datetime64(pre_d[1]))
    in_post = (rows.dates >= np.datetime64(post_d[0])) & (rows.dates <= np.datetime64(post_d[1]))
    # Later reasons first, so that the earliest applicable reason wins.
    reason[~(in_pre | in_post)] = 4
    reason[rows.date_problem == DATE_UNPARSEABLE] = 3
    reason[rows.date_problem == DATE_MISSING] = 2
    reason[~located] = 1
    if keep_types is not None:
        present = set(pd.unique(rows.types[~pd.isna(rows.types)]).tolist())
        unknown = [t for t in keep_types if t not in present]
        if unknown:
            raise InputError(
                f"column {type_column!r} of the incidents '{rows.source}' has no incident of "
                f"type {', '.join(map(repr, unknown))}; its types are "
                f"{', '.join(map(repr, sorted(present))) or 'none'}"
            )
        reason[~np.isin(rows.types.astype(object), np.array(keep_types, dtype=object))] = _SET_ASIDE

    candidates = np.flatnonzero(reason == 0)
    snapped = snap_to_units(rows.x[candidates], rows.y[candidates], units, tolerance)
    unit = np.full(rows.n, -1, dtype=np.int64)
    unit[candidates] = snapped.unit
    reason[candidates[snapped.unit < 0]] = 5
    counted = reason == 0

    n_units = units.n
    data = {
        "pre": np.bincount(unit[counted & in_pre], minlength=n_units),
        "post": np.bincount(unit[counted & in_post], minlength=n_units),
    }
    types: tuple[str, ...] = ()
    names: dict[str, str] = {}
    if by_type:
        labels = rows.types.copy()
        if keep_types is not None:
            # never counted: any kept label keeps them from adding an "untyped" column
            labels[reason == _SET_ASIDE] = keep_types[0]
        labels[pd.isna(labels)] = UNTYPED
        codes, uniques = pd.factorize(labels, sort=True)
        types = tuple(str(u) for u in uniques)
        if UNTYPED in types and (pd.Series(rows.types) == UNTYPED).any():
            raise InputError(
                f"column {type_column!r} of the incidents '{rows.source}' uses the type "
                f"{UNTYPED!r}, which geoexp keeps for incidents without a type; rename it"
            )
        names = _type_column_names(types)
        k = len(types)
        for period, mask in (("pre", counted & in_pre), ("post", counted & in_post)):
            grid = np.bincount(unit[mask] * k + codes[mask], minlength=n_units * k)
            grid = grid.reshape(n_units, k)
            for j, t in enumerate(types):
                data[f"{period}__{names[t]}"] = grid[:, j]
    counts = pd.DataFrame(
        {name: np.asarray(v, dtype=np.int64) for name, v in data.items()}, index=units.ids
    )
    counts.index.name = units.id_column

    per_reason = np.bincount(reason, minlength=len(REASONS) + 2)[1:]  # the last: set aside
    if max_dropped_share is not None:
        _stop_if_mostly_dropped(
            rows,
            units,
            per_reason,
            in_pre & (reason != _SET_ASIDE),
            in_post & (reason != _SET_ASIDE),
            (pre_d, post_d),
            float(max_dropped_share),
        )
    written = None
    if dropped_path is not None:
        written = os.fspath(dropped_path)
        _write_dropped(rows, reason, written)
    drops = DropReport(
        n_incidents=rows.n,
        **{f: int(n) for f, n in zip(_FIELDS, per_reason[: len(REASONS)], strict=True)},
        other_incident_type=int(per_reason[_SET_ASIDE - 1]),
        ties=int(snapped.tied[snapped.unit >= 0].sum()),
        tolerance_m=tolerance,
        source=rows.source,
        dropped_path=written,
        max_dropped_share=None if max_dropped_share is None else float(max_dropped_share),
    )
    return OutcomeTable(
        counts,
        pre_d,
        post_d,
        tolerance,
        drops,
        types,
        rows.source,
        type_column=type_column,
        kept_types=() if keep_types is None else keep_types,
    )


def _likely_cause(
    rows: IncidentRows,
    units: UnitSet,
    per_reason: np.ndarray,
    periods: tuple[tuple[dt.date, dt.date], ...],
) -> str:
    """Plain words on why most incidents were dropped, from the biggest reason."""
    top = REASONS[int(np.argmax(per_reason))]
    if top == "outside tolerance":
        located = np.isfinite(rows.x) & np.isfinite(rows.y)
        ux0, uy0, ux1, uy1 = (float(v) for v in units.geometry.total_bounds)
        px0, px1 = float(np.min(rows.x[located])), float(np.max(rows.x[located]))
        py0, py1 = float(np.min(rows.y[located])), float(np.max(rows.y[located]))
        inside = (
            (rows.x[located] >= ux0)
            & (rows.x[located] <= ux1)
            & (rows.y[located] >= uy0)
            & (rows.y[located] <= uy1)
        )
        share_in = float(inside.mean())
        extent = (
            f"the incidents span x {px0:,.0f} to {px1:,.0f}, y {py0:,.0f} to {py1:,.0f} and the "
            f"units x {ux0:,.0f} to {ux1:,.0f}, y {uy0:,.0f} to {uy1:,.0f} (in the units' CRS)"
        )
        if share_in < 0.5:
            return (
                f"{1 - share_in:.0%} of the located incidents fall outside the units' extent "
                f"({extent}): are longitude and latitude swapped, or is the CRS wrong?"
            )
        return (
            f"the incidents lie within the units' extent ({extent}) but not within the "
            "snapping tolerance of a unit: is the tolerance too small for this layer?"
        )
    if top == "missing coordinates":
        return (
            "most incidents have no usable coordinates: are the coordinate columns the right "
            "ones, and do they hold plain numbers (a decimal point, not a comma)?"
        )
    if top in ("missing date", "unparseable date"):
        return (
            "most incidents have no readable date: is the date column right, and does "
            "date_format match how the dates are written?"
        )
    dated = rows.dates[~np.isnat(rows.dates)]
    span = f"the incidents are dated {dated.min()} to {dated.max()}" if len(dated) else ""
    return (
        f"most incidents are dated outside both periods ({span}; pre {periods[0][0]} to "
        f"{periods[0][1]}, post {periods[1][0]} to {periods[1][1]}): are the periods right?"
    )


def _stop_if_mostly_dropped(
    rows: IncidentRows,
    units: UnitSet,
    per_reason: np.ndarray,
    in_pre: np.ndarray,
    in_post: np.ndarray,
    periods: tuple[tuple[dt.date, dt.date], ...],
    max_share: float,
) -> None:
    """Refuse counts that would silently make a wrong analysis (see ``max_dropped_share``)."""
    # incidents of types left out on purpose are neither counted nor mistakes
    aside = int(per_reason[_SET_ASIDE - 1])
    per_reason = per_reason[: len(REASONS)]
    n = rows.n - aside
    n_dropped = int(per_reason.sum())
    where = f"the incidents '{rows.source}'"
    by_reason = "; ".join(f"{int(k):,} {r}" for r, k in zip(REASONS, per_reason, strict=True) if k)
    left_out = f"{aside:,} of other types left out, " if aside else ""
    tally = f"{rows.n:,} read, {left_out}{n - n_dropped:,} counted, {n_dropped:,} dropped" + (
        f" ({by_reason})" if by_reason else ""
    )
    if rows.n == 0:
        raise InputError(f"{where} hold no incidents (no rows below the header): nothing to count")
    if n == 0:
        raise InputError(f"{where} hold no incident of the types asked for: nothing to count")
    dated = ~np.isnat(rows.dates)
    for name, period, inside in (("pre", periods[0], in_pre), ("post", periods[1], in_post)):
        if not (inside & dated).any():
            span = ""
            if dated.any():
                span = f" (the incidents are dated {rows.dates[dated].min()} to "
                span += f"{rows.dates[dated].max()})"
            raise InputError(
                f"no incident in {where} is dated in the {name}-period {period[0]} to "
                f"{period[1]}{span}; an empty period would be analysed as zero incidents "
                f"everywhere. Check --{name} and the date column ({tally})"
            )
    if n_dropped == n:
        raise InputError(
            f"no incident in {where} could be counted: {tally}. Likely cause: "
            f"{_likely_cause(rows, units, per_reason, periods)}"
        )
    share = n_dropped / n
    if share > max_share:
        raise InputError(
            f"{share:.0%} of the incidents in {where} were dropped, more than the limit of "
            f"{max_share:.0%}: {tally}. Likely cause: "
            f"{_likely_cause(rows, units, per_reason, periods)} If the drops are expected, "
            "raise the limit knowingly (max_dropped_share=, on the command line "
            "--allow-dropped); the choice is recorded."
        )


def _write_dropped(rows: IncidentRows, reason: np.ndarray, path: str) -> None:
    positions = np.flatnonzero((reason > 0) & (reason != _SET_ASIDE))
    out = pd.DataFrame(rows.frame.iloc[positions]).copy()
    geometry = getattr(rows.frame, "geometry", None) if "geometry" in rows.frame else None
    if geometry is not None:
        out["geometry"] = shapely.to_wkt(
            np.asarray(geometry.array, dtype=object)[positions], rounding_precision=-1
        )
    if "reason" in out.columns:
        out = out.rename(columns={"reason": "input_reason"})
    out.insert(0, "reason", np.array(REASONS, dtype=object)[reason[positions] - 1])
    keep_index = rows.row_kind == "frame"
    if keep_index and out.index.name is None:
        out.index.name = "row"
    if rows.row_kind == "csv":
        out.insert(0, "line", np.asarray(rows.row_names(positions), dtype=np.int64))
    elif rows.row_kind == "layer":
        out.insert(0, "feature", positions)
    with atomic_path(Path(path)) as tmp:
        out.to_csv(tmp, index=keep_index, encoding="utf-8")


# ------------------------------------------------------------ trial file


def save_outcomes(
    trial: TrialFile | str | os.PathLike,
    table: OutcomeTable,
    *,
    wait_s: float | None = None,
    notify: Callable[[str], None] | None = None,
) -> TrialFile:
    """Store an outcome table in the trial file: layer ``outcomes`` and ``outcomes_*`` meta keys.

    The write holds the trial's lock and checks the ids against the units the
    file holds at that moment. The table's fingerprint (over the counts and the
    periods) is recorded, so that an edit of the stored counts is noticed. Earlier
    outcomes, and results computed from them, are kept in ``superseded_outcomes``
    and ``superseded_results``.

    Parameters
    ----------
    trial : TrialFile or path
        The trial GeoPackage.
    table : OutcomeTable
        Counts for exactly the trial's units.
    wait_s : float, optional
        Seconds to wait for another command writing the same trial.
    notify : callable, optional
        Receives notes such as "waiting for another geoexp command ...".

    Returns
    -------
    TrialFile
        The re-opened trial file.
    """
    from geoexp.trialfile import store_outcomes

    d = table.drops
    meta = {
        "outcomes_pre": f"{table.pre[0]}/{table.pre[1]}",
        "outcomes_post": f"{table.post[0]}/{table.post[1]}",
        "outcomes_tolerance_m": "" if table.tolerance_m is None else repr(table.tolerance_m),
        "outcomes_types": json.dumps(list(table.types)),
        "outcomes_type_column": table.type_column or "",
        "outcomes_kept_types": json.dumps(list(table.kept_types)),
        "outcomes_drops": json.dumps(
            {
                **d.counts(),
                SET_ASIDE: d.other_incident_type,
                "n_incidents": d.n_incidents,
                "ties": d.ties,
            }
        ),
        "outcomes_source": table.source,
        "outcomes_dropped_path": d.dropped_path or "",
    }
    path = trial.path if isinstance(trial, TrialFile) else trial
    return store_outcomes(path, table.counts, meta, wait_s=wait_s, notify=notify)


def _stored_period(text: str) -> tuple[dt.date, dt.date]:
    """A period as the trial file stores it, ``START/END`` in ISO dates."""
    start, end = text.split("/")
    return dt.date.fromisoformat(start), dt.date.fromisoformat(end)


def load_outcomes(trial: TrialFile | str | os.PathLike) -> OutcomeTable:
    """Read the outcome table stored by :func:`save_outcomes`.

    Parameters
    ----------
    trial : TrialFile or path
        The trial GeoPackage.

    Returns
    -------
    OutcomeTable

    Raises
    ------
    geoexp.errors.TrialIntegrityError
        The stored counts or periods were edited after they were saved.
    """
    from geoexp.errors import TrialIntegrityError
    from geoexp.trialfile import outcomes_fingerprint

    trial = TrialFile.open(trial.path if isinstance(trial, TrialFile) else trial)
    if _LAYER not in trial.layers or "outcomes_pre" not in trial.meta:
        raise InputError(
            f"trial file '{trial.path}' holds no outcomes yet; count them and save them with "
            "save_outcomes()"
        )
    meta = trial.meta
    frame = pd.DataFrame(trial.read(_LAYER)).drop(columns="geometry", errors="ignore")
    recorded = meta.get("outcomes_fingerprint")
    if recorded and outcomes_fingerprint(frame, meta["outcomes_pre"], meta["outcomes_post"]) != (
        recorded
    ):
        raise TrialIntegrityError(
            f"the outcomes stored in trial file '{trial.path}' (layer {_LAYER!r} and its periods) "
            f"were edited after they were saved on {meta.get('outcomes_saved_at', '?')}; count "
            "them again, or restore the file from a copy"
        )
    counts = frame.astype(np.int64)
    pre, post = (_stored_period(meta[f"outcomes_{name}"]) for name in ("pre", "post"))
    tol = float(meta["outcomes_tolerance_m"]) if meta.get("outcomes_tolerance_m") else None
    types = tuple(json.loads(meta["outcomes_types"]))
    stored = json.loads(meta["outcomes_drops"])
    drops = DropReport(
        n_incidents=int(stored["n_incidents"]),
        **{f: int(stored[r]) for r, f in zip(REASONS, _FIELDS, strict=True)},
        other_incident_type=int(stored.get(SET_ASIDE, 0)),
        ties=int(stored["ties"]),
        tolerance_m=tol,
        source=meta.get("outcomes_source", ""),
        dropped_path=meta.get("outcomes_dropped_path") or None,
    )
    return OutcomeTable(
        counts,
        pre,
        post,
        tol,
        drops,
        types,
        meta.get("outcomes_source", ""),
        type_column=meta.get("outcomes_type_column") or None,
        kept_types=tuple(json.loads(meta.get("outcomes_kept_types") or "[]")),
    )
