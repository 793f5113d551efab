"""Read incident points and their dates into plain arrays in the units' CRS.

Policy
------
* Sources: a CSV (``.csv``, ``.txt``; ``.tsv`` is tab-separated) with x/y
  columns in a stated CRS or longitude/latitude columns (EPSG:4326); a point
  layer (GeoPackage, GeoJSON, Shapefile, ...); a PostGIS table or query (a
  ``postgresql://`` URL or a ``DatabaseSource``; rows are numbered from 0 in
  the order the server returns them); a GeoDataFrame; a DataFrame with
  coordinate columns. CSV cells are read as text so that nothing (dates above
  all) is converted behind the user's back.
* Coordinates: empty, non-numeric, non-finite or (for longitude/latitude) out
  of range values, and missing or empty point geometry, make an incident
  "missing coordinates"; it is dropped and reported, not an error. Geometry
  other than points is an error. x/y columns without ``crs=`` are an error:
  a CRS is never guessed. ``crs="planar"`` says the coordinates are the
  units' own local planar coordinates (only for units declared planar).
* Undated incidents (``date_column=None``) are read for counts over all time.
* Dates are calendar dates as written: a time of day or a UTC offset after the
  date is ignored, never converted to another time zone. Text is read as ISO
  8601 (``2024-03-05``, ``2024-03-05T21:30``, also ``2024/03/05``) unless
  ``date_format`` says otherwise: ``"dmy"`` (``05/03/2024``, ``05.03.2024``,
  ``05-03-2024``), ``"mdy"`` (``03/05/2024``) or a strftime pattern such as
  ``"%d %b %Y"``. Day/month dates without ``date_format`` are refused with
  examples, because ``03/05/2024`` is 3 May in one country and March 5 in
  another. Empty cells are "missing date"; cells that cannot be read (or name an
  impossible day, like 31/02) are "unparseable date"; both are reported, but a
  column in which no date at all can be read is an error.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import shapely

from geoexp.errors import CRSError, GeometryError, InputError, describe_rows
from geoexp.postgis import DatabaseSource, read_source
from geoexp.units import (
    database_source,
    describe_crs,
    is_planar,
    parse_crs,
    read_layer,
    require_geographic_reference,
)

#: ``crs=`` for incidents in the units' own local planar coordinates (a layer declared planar)
PLANAR_WORD = "planar"

# Date problems, coded per incident.
DATE_OK, DATE_MISSING, DATE_UNPARSEABLE = 0, 1, 2

_CSV_SUFFIXES = {".csv": ",", ".txt": ",", ".tsv": "\t"}
_NAMED_FORMATS = ("iso", "dmy", "mdy")
# Year first (ISO 8601 and its slash/dot cousins); anything after the date (a
# time, an offset) is allowed and ignored.
_YEAR_FIRST = r"^\s*(\d{4})[-/.](\d{1,2})[-/.](\d{1,2})(?:[T\s].*)?$"
# Day and month first, in some order, with a four-digit year.
_DAY_MONTH = r"^\s*(\d{1,2})[-/.](\d{1,2})[-/.](\d{4})(?:[T\s].*)?$"
_EXAMPLES = 5
_CANONICAL = {"ymd": "%Y-%m-%d", "dmy": "%d/%m/%Y", "mdy": "%m/%d/%Y"}


@dataclass(frozen=True, eq=False)
class InputRows:
    """The rows as read, and how a user finds a row in their input."""

    frame: pd.DataFrame  # never modified: the dropped rows are written from it
    source: str
    row_kind: str  # "csv" (lines), "layer" (feature numbers) or "frame" (index labels)

    def row_names(self, positions: np.ndarray) -> list[object]:
        if self.row_kind == "csv":
            return [int(p) + 2 for p in positions]  # line 1 is the header
        if self.row_kind == "layer":
            return [int(p) for p in positions]
        return list(self.frame.index[positions])

    def examples(self, text: pd.Series, positions: np.ndarray) -> str:
        """``'03/04/2024' (line 3), ...`` for the first few positions."""
        word = {"csv": "line", "layer": "feature"}.get(self.row_kind, "row")
        shown = positions[:_EXAMPLES]
        names = self.row_names(shown)
        return ", ".join(
            f"{t!r} ({word} {n})" for t, n in zip(text.iloc[shown], names, strict=True)
        )

    def rows_phrase(self, positions: np.ndarray) -> str:
        names = describe_rows(self.row_names(positions))
        if self.row_kind == "csv":
            return f"lines {names}"
        if self.row_kind == "layer":
            return f"features {names} (counting from 0 in file order)"
        return f"rows {names}"


@dataclass(frozen=True, eq=False)
class IncidentRows(InputRows):
    """Incidents as arrays, one entry per input row, in input order."""

    x: np.ndarray  # float64, units' CRS; NaN where coordinates are missing
    y: np.ndarray
    dates: np.ndarray  # datetime64[D]; NaT where missing or unreadable
    date_problem: np.ndarray  # int8: DATE_OK, DATE_MISSING, DATE_UNPARSEABLE
    types: np.ndarray  # object array of type labels (None where missing or no type column)

    @property
    def n(self) -> int:
        return len(self.x)


def read_incidents(
    incidents: str | os.PathLike | pd.DataFrame | DatabaseSource,
    target_crs: pyproj.CRS,
    *,
    date_column: str | None,
    type_column: str | None,
    x: str | None,
    y: str | None,
    lon: str | None,
    lat: str | None,
    crs: object,
    date_format: str | None,
    layer: str | None,
) -> IncidentRows:
    """Read incidents from any supported source into :class:`IncidentRows`."""
    if (x is None) != (y is None):
        raise InputError("give both x= and y= (the coordinate columns), or neither")
    if (lon is None) != (lat is None):
        raise InputError("give both lon= and lat= (the coordinate columns), or neither")
    if x is not None and lon is not None:
        raise InputError("give either x=/y= or lon=/lat=, not both")

    database = database_source(incidents, layer)
    if database is not None:
        frame = read_source(database, "incidents", need_geometry=False)
        source = database.label
        row_kind = "frame"
    elif isinstance(incidents, (str, os.PathLike)):
        path = Path(incidents)
        source = os.fspath(incidents)
        if path.suffix.lower() in _CSV_SUFFIXES:
            frame = _read_csv(path, _CSV_SUFFIXES[path.suffix.lower()])
            row_kind = "csv"
        else:
            frame = read_layer(source, layer, "incidents")
            row_kind = "layer"
    elif isinstance(incidents, pd.DataFrame):
        frame = incidents
        source = "<GeoDataFrame>" if isinstance(frame, gpd.GeoDataFrame) else "<DataFrame>"
        row_kind = "frame"
    else:
        raise InputError(
            "incidents must be a file path (CSV or a point layer), a postgresql:// URL, a "
            f"GeoDataFrame or a DataFrame, not {type(incidents).__name__}"
        )

    needed = [date_column, type_column, x, y, lon, lat]
    _require_columns(frame, [c for c in needed if c is not None], source)

    named = InputRows(frame, source, row_kind)
    if isinstance(crs, str) and crs.strip().lower() == PLANAR_WORD:
        if not is_planar(target_crs):
            raise CRSError(
                f"crs='planar' says the incidents '{source}' are in the units' local planar "
                f"coordinates, but the units are in {describe_crs(target_crs)}; give the "
                "incidents' real CRS"
            )
        crs = target_crs
    if x is not None:
        if crs is None:
            raise CRSError(
                f"the incidents '{source}' give coordinates in columns {x!r}/{y!r} but no CRS; "
                "geoexp does not guess one: pass crs=, e.g. crs='EPSG:4326' for longitude/"
                "latitude (or use lon=/lat=) or the EPSG code of the projected system"
            )
        src_crs = parse_crs(crs, f"crs= for the incidents '{source}'")
        px, py = _numbers(frame[x]), _numbers(frame[y])
    elif lon is not None:
        if crs is not None and not parse_crs(crs, "crs=").equals(
            pyproj.CRS(4326), ignore_axis_order=True
        ):
            raise CRSError(
                f"lon=/lat= are longitude/latitude in EPSG:4326, but crs= says "
                f"{describe_crs(parse_crs(crs, 'crs='))}; for projected coordinates use x=/y="
            )
        src_crs = pyproj.CRS(4326)
        # lon= and lat= come together (checked on entry)
        assert lat is not None
        px, py = _numbers(frame[lon]), _numbers(frame[lat])
        _check_lon_lat(named, px, py, lon, lat)
    elif isinstance(frame, gpd.GeoDataFrame):
        src_crs = _layer_crs(frame, crs, source)
        px, py = _point_xy(named, frame)
    else:
        raise InputError(
            f"the incidents '{source}' have no geometry: name the coordinate columns with "
            "x=/y= (and crs=) or lon=/lat=; its columns are "
            f"{', '.join(repr(str(c)) for c in frame.columns)}"
        )

    px, py = _to_target(px, py, src_crs, target_crs)
    if date_column is None:
        dates = np.full(len(frame), np.datetime64("NaT"), dtype="datetime64[D]")
        problem = np.full(len(frame), DATE_OK, dtype=np.int8)
    else:
        dates, problem = parse_dates(frame[date_column], date_column, date_format, named)
    types = np.full(len(frame), None, dtype=object)  # no type column: every type missing
    if type_column is not None:
        labels = frame[type_column].astype("str").str.strip()
        blank = labels.isna().to_numpy(dtype=bool) | labels.eq("").fillna(True).to_numpy(bool)
        types = labels.to_numpy(dtype=object, na_value=None)
        types[blank] = None
    return IncidentRows(frame, source, row_kind, px, py, dates, problem, types)


def _read_csv(path: Path, sep: str) -> pd.DataFrame:
    if not path.exists():
        raise InputError(f"the incidents file '{path}' does not exist")
    try:
        # Text only: pandas' own type guessing would read dates and codes its own way.
        return pd.read_csv(path, sep=sep, dtype=str, encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError, pd.errors.ParserError, pd.errors.EmptyDataError) as err:
        raise InputError(f"could not read the incidents file '{path}' as CSV: {err}") from err


def _require_columns(frame: pd.DataFrame, columns: list[str], source: str) -> None:
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        have = ", ".join(repr(str(c)) for c in frame.columns if c != "geometry")
        raise InputError(
            f"the incidents '{source}' have no column {' or '.join(repr(c) for c in missing)}; "
            f"their columns are {have}"
        )


def _numbers(values: pd.Series) -> np.ndarray:
    # Text that is not a number is treated like an empty cell: the row is dropped
    # and reported as having no usable coordinates.
    out = pd.to_numeric(values, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
    out = out.copy()
    out[~np.isfinite(out)] = np.nan
    return out


def _check_lon_lat(
    named: InputRows, lon: np.ndarray, lat: np.ndarray, lon_name: str, lat_name: str
) -> None:
    given = np.isfinite(lon) & np.isfinite(lat)
    bad = given & ((np.abs(lon) > 180) | (np.abs(lat) > 90))
    if given.any() and bad.all(where=given):
        # Every point is off the globe: these are projected x/y, not degrees.
        raise CRSError(
            f"columns {lon_name!r}/{lat_name!r} of the incidents '{named.source}' hold values "
            f"such as {lon[given][0]!r}, {lat[given][0]!r}, which are not longitude/latitude in "
            "degrees; for projected coordinates use x=/y= with crs="
        )
    lon[bad] = np.nan
    lat[bad] = np.nan


def _layer_crs(frame: gpd.GeoDataFrame, crs: object, source: str) -> pyproj.CRS:
    given = None if crs is None else parse_crs(crs, f"crs= for the incidents '{source}'")
    if frame.crs is None:
        if given is None:
            raise CRSError(
                f"the incident layer '{source}' has no CRS; geoexp does not guess one: pass it "
                "with crs="
            )
        return given
    had = pyproj.CRS(frame.crs)
    if given is not None and not had.equals(given, ignore_axis_order=True):
        raise CRSError(
            f"the incident layer '{source}' is in {describe_crs(had)} but crs= says "
            f"{describe_crs(given)}; drop crs= or reproject the layer"
        )
    return had


def _point_xy(named: InputRows, frame: gpd.GeoDataFrame) -> tuple[np.ndarray, np.ndarray]:
    geoms = np.asarray(frame.geometry.array, dtype=object)
    absent = shapely.is_missing(geoms) | shapely.is_empty(geoms)
    kind = shapely.get_type_id(geoms)
    wrong = ~absent & (kind != 0)
    if wrong.any():
        raise GeometryError(
            f"incidents must be points, but {int(wrong.sum())} features of '{named.source}' "
            f"are other geometry: {named.rows_phrase(np.flatnonzero(wrong))}"
        )
    px = np.where(absent, np.nan, shapely.get_x(geoms))
    py = np.where(absent, np.nan, shapely.get_y(geoms))
    bad = ~(np.isfinite(px) & np.isfinite(py))
    px[bad] = np.nan
    py[bad] = np.nan
    return px, py


def _to_target(px, py, src: pyproj.CRS, dst: pyproj.CRS) -> tuple[np.ndarray, np.ndarray]:
    if not src.equals(dst, ignore_axis_order=True):
        require_geographic_reference(dst, f"incidents in {describe_crs(src)}")
        require_geographic_reference(src, f"units in {describe_crs(dst)} and these incidents")
        # always_xy: longitude first whatever the CRS's official axis order.
        transformer = pyproj.Transformer.from_crs(src, dst, always_xy=True)
        px, py = transformer.transform(px, py)
        px, py = np.asarray(px, dtype=np.float64), np.asarray(py, dtype=np.float64)
    bad = ~(np.isfinite(px) & np.isfinite(py))
    px, py = px.copy(), py.copy()
    px[bad] = np.nan
    py[bad] = np.nan
    return px, py


# ----------------------------------------------------------------------- dates


def parse_dates(
    values: pd.Series, column: str, date_format: str | None, named: InputRows
) -> tuple[np.ndarray, np.ndarray]:
    """Parse a date column into datetime64[D] plus a per-row problem code."""
    where = f"column {column!r} of the incidents '{named.source}'"
    if date_format is not None and "%" not in date_format and date_format not in _NAMED_FORMATS:
        raise InputError(
            f"date_format={date_format!r} is not understood; use 'iso', 'dmy' (day first, "
            "e.g. 25/03/2024), 'mdy' (month first, e.g. 03/25/2024) or a strftime pattern "
            "such as '%d %b %Y'"
        )
    missing = values.isna().to_numpy(dtype=bool)
    if pd.api.types.is_datetime64_any_dtype(values.dtype):
        stamps = values
        if getattr(values.dt, "tz", None) is not None:
            stamps = values.dt.tz_localize(None)  # keep the wall-clock date as written
        days = stamps.to_numpy(dtype="datetime64[D]")
        return days, np.where(missing, DATE_MISSING, DATE_OK).astype(np.int8)

    inferred = pd.api.types.infer_dtype(values, skipna=True)
    if inferred in ("date", "datetime", "datetime64"):
        days = pd.to_datetime(values, errors="coerce").to_numpy(dtype="datetime64[D]")
        return days, np.where(missing, DATE_MISSING, DATE_OK).astype(np.int8)
    if inferred in ("integer", "floating", "mixed-integer-float") and (
        date_format is None or "%" not in date_format
    ):
        raise InputError(
            f"{where} holds numbers, not dates (e.g. {values.dropna().iloc[0]!r}); give dates "
            "as text such as 2024-03-25, or a strftime date_format such as '%Y%m%d'"
        )

    # pandas' "str" dtype keeps missing cells missing (astype(object) then str would not).
    text = values.astype("str")
    blank = missing | text.str.strip().eq("").fillna(True).to_numpy(dtype=bool)

    if date_format is not None and "%" in date_format:
        days = pd.to_datetime(text.where(~blank), format=date_format, errors="coerce")
        days = days.to_numpy(dtype="datetime64[D]")
    elif date_format in ("dmy", "mdy"):
        days = _from_parts(text, _DAY_MONTH, date_format)
    else:
        days = _from_parts(text, _YEAR_FIRST, "ymd")
        failed = ~blank & np.isnat(days)
        if date_format is None and failed.any():
            day_month = text[failed].str.match(_DAY_MONTH).fillna(False).to_numpy(dtype=bool)
            if day_month.any():
                _refuse_day_month(text, np.flatnonzero(failed)[day_month], where, named)

    failed = ~blank & np.isnat(days)
    if failed.any() and failed.sum() == (~blank).sum():
        examples = named.examples(text, np.flatnonzero(failed))
        how = "ISO 8601 (2024-03-25)" if date_format in (None, "iso") else repr(date_format)
        raise InputError(
            f"no date in {where} could be read as {how}: {examples}; give the format with "
            "date_format= ('dmy', 'mdy' or a strftime pattern such as '%d %b %Y')"
        )
    problem = np.where(blank, DATE_MISSING, np.where(failed, DATE_UNPARSEABLE, DATE_OK))
    days = days.copy()
    days[blank] = np.datetime64("NaT")
    return days, problem.astype(np.int8)


def _from_parts(text: pd.Series, pattern: str, order: str) -> np.ndarray:
    # Fast path for the canonical ten-character spelling ("2024-03-05",
    # "05/03/2024"); the regular expression, which is several times slower,
    # handles the rest (single digits, other separators, a time after the date).
    days = np.full(len(text), np.datetime64("NaT"), dtype="datetime64[D]")
    canonical = (text.str.len() == 10).fillna(False).to_numpy(dtype=bool)
    if canonical.any():
        days[canonical] = pd.to_datetime(
            text[canonical], format=_CANONICAL[order], errors="coerce"
        ).to_numpy(dtype="datetime64[D]")
    rest = np.flatnonzero(np.isnat(days) & text.notna().to_numpy(dtype=bool))
    if len(rest) == 0:
        return days
    parts = text.iloc[rest].str.extract(pattern)
    fields = dict(zip(order, range(3), strict=True))
    frame = pd.DataFrame(
        {
            "year": pd.to_numeric(parts[fields["y"]], errors="coerce"),
            "month": pd.to_numeric(parts[fields["m"]], errors="coerce"),
            "day": pd.to_numeric(parts[fields["d"]], errors="coerce"),
        }
    )
    # An impossible day (31/02) becomes NaT rather than rolling over into March.
    days[rest] = pd.to_datetime(frame, errors="coerce").to_numpy(dtype="datetime64[D]")
    return days


def _refuse_day_month(text: pd.Series, positions: np.ndarray, where: str, named: InputRows) -> None:
    parts = text.iloc[positions].str.extract(_DAY_MONTH)
    first = pd.to_numeric(parts[0]).to_numpy()
    second = pd.to_numeric(parts[1]).to_numpy()
    ambiguous = (first <= 12) & (second <= 12) & (first != second)
    show = positions[ambiguous] if ambiguous.any() else positions
    examples = named.examples(text, show)
    hint = ""
    if (first > 12).any() and not (second > 12).any():
        hint = " Some values have a first number above 12, which suggests day first ('dmy')."
    elif (second > 12).any() and not (first > 12).any():
        hint = " Some values have a second number above 12, which suggests month first ('mdy')."
    raise InputError(
        f"{len(positions):,} dates in {where} are written day/month or month/day, which "
        f"geoexp does not guess between, e.g. {examples}. "
        f"'03/05/2024' is 3 May in some countries and March 5 in others. Say which with "
        f"date_format='dmy' (day first) or date_format='mdy' (month first).{hint}"
    )
