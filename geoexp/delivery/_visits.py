"""Read officers' visit logs: one row per visit, at a unit id or at coordinates.

Policy
------
* Sources: a CSV (read as text), a layer (GeoPackage, GeoJSON, ...; point
  geometry gives the position) or a DataFrame.
* Place: a column of unit ids (matched to the trial's ids; an unknown id is
  an error naming the rows), or x/y (with ``crs=``) or lon/lat columns, or the
  layer's points, snapped to the nearest unit within ``tolerance_m`` metres (a
  position farther than that from every unit is an error naming the rows).
* Times: ``start`` and ``end`` as ISO 8601 local clock times
  (``2025-03-05 21:30``); a UTC offset is refused (see the pings' policy).
  An empty or unreadable time, an end before the start, or a visit longer
  than ``max_hours`` (default 12, longer than any shift: a typing error) is
  an error naming the rows. The minutes present are ``end - start``.
* Optional columns: the team (or officer) and the activity type, kept as text.
"""

from __future__ import annotations

import os
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj

from geoexp.delivery._from_pings import DEFAULT_TOLERANCE_M, unit_index
from geoexp.delivery._snap import snap_points
from geoexp.delivery._table import StayTable
from geoexp.errors import InputError, describe_rows

DEFAULT_MAX_HOURS = 12.0


def read_visits(
    visits: str | os.PathLike | pd.DataFrame,
    units,
    *,
    start: str = "start",
    end: str = "end",
    unit_column: str | None = None,
    x: str | None = None,
    y: str | None = None,
    lon: str | None = None,
    lat: str | None = None,
    crs: object = None,
    team_column: str | None = None,
    activity_column: str | None = None,
    tolerance_m: float = DEFAULT_TOLERANCE_M,
    max_hours: float = DEFAULT_MAX_HOURS,
    layer: str | None = None,
) -> StayTable:
    """Read and validate a visit log into a :class:`StayTable` (one stay per visit).

    Parameters
    ----------
    visits : path or DataFrame
        CSV, point layer or frame, one row per visit.
    units : geoexp.units.UnitSet
        The trial's units.
    start, end : str
        Columns of the visit's start and end (local clock times).
    unit_column : str, optional
        Column of unit ids; otherwise give x/y (and crs), lon/lat, or a point layer.
    x, y : str, optional
        Columns of the logged position's easting and northing in ``crs``.
    lon, lat : str, optional
        Columns of the logged position's longitude and latitude in decimal
        degrees (WGS 84, EPSG:4326).
    crs : optional
        CRS of ``x``/``y``: anything pyproj accepts (``"EPSG:2263"``, an EPSG
        code, WKT, a ``pyproj.CRS``).
    team_column, activity_column : str, optional
        Columns of the team or officer and the activity type.
    tolerance_m : float
        Largest distance in metres from a logged position to its unit.
    max_hours : float
        Longest believable visit, in hours.
    layer : str, optional
        Layer of a multi-layer file.

    Returns
    -------
    StayTable

    Raises
    ------
    geoexp.errors.InputError
        A missing column, an unknown unit id, an unreadable time, an end
        before its start, a visit longer than ``max_hours`` or a position
        farther than the tolerance from every unit; the message names the
        file, the column and the rows.
    """
    frame, source, word, first = _read(visits, layer)
    named = [
        c for c in (start, end, unit_column, x, y, lon, lat, team_column, activity_column) if c
    ]
    missing = [c for c in named if c not in frame.columns]
    if missing:
        raise InputError(
            f"the visit log '{source}' has no column {', '.join(map(repr, missing))}; its columns "
            f"are {', '.join(repr(str(c)) for c in frame.columns)}"
        )
    rows = np.arange(len(frame)) + first

    def where(column, bad):
        return f"column {column!r} of the visit log '{source}' at {word}s {describe_rows(rows[bad].tolist())}"

    begin = _times(frame[start], start, where)
    finish = _times(frame[end], end, where)
    backwards = np.flatnonzero(finish < begin)
    if len(backwards):
        raise InputError(f"the visit ends before it starts: {where(end, backwards)}")
    minutes = (finish - begin).astype(np.float64) / 60.0
    long = np.flatnonzero(minutes > max_hours * 60)
    if len(long):
        raise InputError(f"visits longer than {max_hours:g} hours: {where(end, long)}")

    if unit_column is not None:
        positions = _match_ids(frame[unit_column], units.ids)
        unknown = np.flatnonzero(positions < 0)
        if len(unknown):
            raise InputError(
                f"unit ids not in the trial's units: {where(unit_column, unknown)} (e.g. "
                f"{frame[unit_column].iloc[unknown[0]]!r})"
            )
    else:
        px, py, label = _positions(frame, source, units.crs, x, y, lon, lat, crs)
        tolerance = tolerance_m / units.metres_per_unit
        positions, _ = snap_points(unit_index(units), px, py, tolerance)
        far = np.flatnonzero(positions < 0)
        if len(far):
            raise InputError(
                f"positions with no unit within {tolerance_m:g} m (or no position): "
                f"{where(label, far)}"
            )

    def text(column):
        if column is None:
            return np.full(len(frame), None, dtype=object)
        values = frame[column].astype("string").str.strip()
        return values.where(values.fillna("") != "", None).to_numpy(dtype=object, na_value=None)

    table = pd.DataFrame(
        {
            "unit": units.ids[positions],
            "start": begin.astype("datetime64[s]"),
            "end": finish.astype("datetime64[s]"),
            "minutes": minutes,
            "device": pd.Series(text(team_column), dtype=object),
            "activity": pd.Series(text(activity_column), dtype=object),
        }
    )
    summary = {"rows": f"{len(frame):,} logged visits"}
    return StayTable(table, units.ids, source, summary)


def _read(visits, layer):
    if isinstance(visits, pd.DataFrame):
        return visits, "<DataFrame>", "row", 0
    if not isinstance(visits, (str, os.PathLike)):
        raise InputError(f"visits must be a file path or a DataFrame, not {type(visits).__name__}")
    path = Path(visits)
    if not path.exists():
        raise InputError(f"the visit log '{path}' does not exist")
    try:
        if path.suffix.lower() in (".csv", ".txt", ".tsv"):
            sep = "\t" if path.suffix.lower() == ".tsv" else ","
            return pd.read_csv(path, sep=sep, dtype=str, encoding="utf-8-sig"), str(path), "line", 2
        return gpd.read_file(path, layer=layer), str(path), "feature", 0
    except (OSError, UnicodeDecodeError, ValueError, pd.errors.ParserError) as err:
        raise InputError(f"could not read the visit log '{path}': {err}") from err


def _times(column: pd.Series, name: str, where) -> np.ndarray:
    text = column.astype("string").str.strip()
    empty = np.flatnonzero(text.fillna("").eq("").to_numpy())
    if len(empty):
        raise InputError(f"empty times in {where(name, empty)}")
    offset = np.flatnonzero(text.str.contains(r"(?:Z|[+-]\d\d:?\d\d)$", regex=True).to_numpy(bool))
    if len(offset):
        raise InputError(
            f"times with a UTC offset in {where(name, offset)}; give local clock times "
            "(geoexp does not convert clocks)"
        )
    parsed = pd.to_datetime(text, format="ISO8601", errors="coerce")
    bad = np.flatnonzero(parsed.isna().to_numpy())
    if len(bad):
        raise InputError(
            f"times that cannot be read in {where(name, bad)} (e.g. {text.iloc[bad[0]]!r}); "
            "write them as ISO 8601 such as 2025-03-05 21:30"
        )
    return parsed.to_numpy().astype("datetime64[s]").astype(np.int64)


def _match_ids(column: pd.Series, ids: pd.Index) -> np.ndarray:
    values = column
    if ids.dtype.kind in "iu":
        values = pd.to_numeric(column, errors="coerce")
        whole = values.notna() & (values == values.round())
        values = values.where(whole)
    else:
        values = column.astype("string").str.strip()
    return ids.get_indexer(pd.Index(values.to_numpy(dtype=object, na_value=None)))


def _positions(frame, source, target, x, y, lon, lat, crs):
    if x is not None and y is not None:
        if crs is None:
            raise InputError(f"the visit log '{source}' gives x/y but no CRS: pass crs=")
        src, cx, cy = pyproj.CRS.from_user_input(crs), x, y
    elif lon is not None and lat is not None:
        src, cx, cy = pyproj.CRS(4326), lon, lat
    elif isinstance(frame, gpd.GeoDataFrame) and frame.geometry.notna().any():
        if frame.crs is None:
            raise InputError(f"the visit log '{source}' has no CRS")
        geometry = frame.geometry
        point = geometry.geom_type.eq("Point").to_numpy()
        px = np.where(point, geometry.x.where(point), np.nan)
        py = np.where(point, geometry.y.where(point), np.nan)
        t = pyproj.Transformer.from_crs(frame.crs, target, always_xy=True)
        px, py = t.transform(px, py)
        return np.asarray(px, float), np.asarray(py, float), "geometry"
    else:
        raise InputError(
            f"the visit log '{source}' needs a place: unit_column=, x=/y= with crs=, or lon=/lat="
        )
    px = pd.to_numeric(frame[cx], errors="coerce").to_numpy(dtype=float)
    py = pd.to_numeric(frame[cy], errors="coerce").to_numpy(dtype=float)
    t = pyproj.Transformer.from_crs(src, target, always_xy=True)
    px, py = t.transform(px, py)
    return np.asarray(px, float), np.asarray(py, float), f"{cx}/{cy}"
