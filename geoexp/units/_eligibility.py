"""Choose eligible units: attribute rules, hot spots by count, exclusion zones.

Each function returns the positions (or a keep-mask) of the units to keep and a
plain-language description for the UnitSet's notes; the UnitSet builds the new
object, so nothing here touches a frame in place.

Tie policy of :func:`top_positions`
-----------------------------------
Units are ranked by count, largest first; equal counts are ordered by unit id,
ascending (the same order ``sorted`` gives). The first ``k`` are kept, so
exactly ``k`` units are selected even when several share the count at the
cut-off, and the note says how many were tied there and how many of them were
kept. A stable, documented order keeps the selection reproducible; breaking
ties at random would make eligibility depend on a seed nobody recorded.
"""

from __future__ import annotations

import math
import numbers
import os
from typing import Any, Literal

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import shapely

from geoexp.errors import CRSError, GeometryError, InputError, describe_rows
from geoexp.units._crs import describe_crs
from geoexp.units._read import read_layer
from geoexp.units._rules import Rule
from geoexp.units._validate import polygonal_part

_POLYGONS = (3, 6)


def select_mask(frame: gpd.GeoDataFrame, where: object, source: str) -> tuple[np.ndarray, str]:
    """Keep-mask from a rule (see :mod:`geoexp.units._rules`) or a boolean mask aligned to the ids."""
    n = len(frame)
    ids = frame.index
    if isinstance(where, str):
        # Our own grammar, never pandas' eval: a rule can name columns, nothing else.
        return Rule.parse(where).mask(frame, source), f"rule {where!r}"
    if isinstance(where, pd.Series):
        series = where
        if not series.index.equals(ids):
            missing = ids.difference(series.index)
            extra = series.index.difference(ids)
            if len(missing) or len(extra) or series.index.has_duplicates:
                raise InputError(
                    "a mask given as a Series must be indexed by the unit ids, once each; "
                    f"ids without a value: {describe_rows(missing) or 'none'}; "
                    f"values for unknown ids: {describe_rows(extra) or 'none'}"
                )
            series = series.reindex(ids)
        if series.isna().any():
            raise InputError(f"the mask has no value for ids {describe_rows(ids[series.isna()])}")
        if not pd.api.types.is_bool_dtype(series.dtype):
            raise InputError(f"the mask must be true/false, got dtype {series.dtype}")
        return series.to_numpy(dtype=bool), "a boolean mask"
    array = np.asarray(where)
    if array.dtype != bool or array.shape != (n,):
        raise InputError(
            f"where= must be a query string or a boolean mask of length {n}; "
            f"got an array of dtype {array.dtype} and shape {array.shape}"
        )
    return array.copy(), "a boolean mask"


def top_positions(
    frame: gpd.GeoDataFrame,
    column: str,
    k: int | None,
    share: float | None,
    source: str,
) -> tuple[np.ndarray, str, list[str]]:
    """Positions, in layer order, of the ``k`` (or ``share``) units with the largest counts."""
    n = len(frame)
    if column not in frame.columns or column == "geometry":
        columns = [c for c in frame.columns if c != "geometry"]
        raise InputError(
            f"the units of '{source}' have no column {column!r}; columns: "
            f"{describe_rows(columns, limit=len(columns)) or 'none'}"
        )
    if (k is None) == (share is None):
        raise InputError("give exactly one of k= (a number of units) or share= (a fraction)")
    notes: list[str] = []
    raw = frame[column]
    if pd.api.types.is_bool_dtype(raw.dtype):
        raise InputError(f"column {column!r} of '{source}' is true/false, not a count")
    counts = pd.to_numeric(raw, errors="coerce")
    bad = counts.isna().to_numpy() | ~np.isfinite(counts.to_numpy(dtype=float, na_value=np.nan))
    if bad.any():
        raise InputError(
            f"column {column!r} of '{source}' must hold numbers to rank units; "
            f"{int(bad.sum())} units have missing or non-numeric values: ids "
            f"{describe_rows(frame.index[bad])} (values {describe_rows(raw[bad].tolist())})"
        )
    if not pd.api.types.is_numeric_dtype(raw.dtype):
        notes.append(f"column {column!r} held numbers stored as text; they were read as numbers")
    if k is not None:
        if isinstance(k, bool) or not isinstance(k, numbers.Integral) or k < 1:
            raise InputError(f"k must be a whole number of units, at least 1; got {k!r}")
        if k > n:
            raise InputError(f"k={k} is larger than the number of units ({n:,}) in '{source}'")
        k = int(k)
        rule = f"top {k:,} by {column!r}"
    else:
        if (
            isinstance(share, bool)
            or not isinstance(share, numbers.Real)
            or not 0 < share <= 1
            or math.isnan(share)
        ):
            raise InputError(f"share must be a fraction in (0, 1]; got {share!r}")
        # Round first so that 0.7 * 10 = 7.000000000000001 keeps 7 units, not 8.
        k = max(1, math.ceil(round(float(share) * n, 9)))
        rule = f"top {share:.4g} share ({k:,} units, rounded up) by {column!r}"

    values = counts.to_numpy(dtype=np.float64)
    id_rank = np.empty(n, dtype=np.int64)
    id_rank[frame.index.argsort()] = np.arange(n)
    # lexsort sorts by its last key first: count descending, then id ascending.
    order = np.lexsort((id_rank, -values))
    kept = np.sort(order[:k])
    cut = values[order[k - 1]]
    tied = int(np.count_nonzero(values == cut))
    tied_kept = int(np.count_nonzero(values[kept] == cut))
    if tied > tied_kept:
        notes.append(
            f"{tied} units were tied at the cut-off value {cut:g} of {column!r}; kept the "
            f"{tied_kept} of them with the smallest ids (ties are broken by ascending id so "
            f"that exactly {k:,} units are kept)"
        )
    else:
        notes.append(f"no ties at the cut-off value {cut:g} of {column!r}")
    return kept, rule, notes


def _zone_geometries(zones: object, layer: str | None) -> tuple[gpd.GeoSeries, str]:
    if isinstance(zones, (str, os.PathLike)):
        frame = read_layer(zones, layer, "exclusion zone")
        label = f"'{os.fspath(zones)}'" + (f" (layer {layer!r})" if layer else "")
        return frame.geometry, label
    if layer is not None:
        raise InputError("layer= only applies when the exclusion zones are given as a file path")
    if isinstance(zones, gpd.GeoDataFrame):
        return zones.geometry, "the GeoDataFrame given"
    if isinstance(zones, gpd.GeoSeries):
        return zones, "the GeoSeries given"
    raise InputError(
        "exclusion zones must be a file path (GeoJSON, GeoPackage, Shapefile), a GeoDataFrame "
        f"or a GeoSeries of polygons; got {type(zones).__name__}"
    )


def exclude_mask(
    frame: gpd.GeoDataFrame,
    zones: object,
    layer: str | None,
    how: Literal["intersects", "within"],
) -> tuple[np.ndarray, str, list[str]]:
    """Keep-mask of the units not touching (or not inside) any exclusion zone."""
    if how not in ("intersects", "within"):
        raise InputError(f"how must be 'intersects' or 'within', got {how!r}")
    series, label = _zone_geometries(zones, layer)
    if len(series) == 0:
        raise InputError(f"the exclusion zones from {label} hold no features")
    if series.crs is None:
        raise CRSError(
            f"the exclusion zones from {label} have no CRS; geoexp does not guess one. Set it "
            "(zones drawn on a web map are longitude/latitude, EPSG:4326), e.g. "
            "zones.set_crs('EPSG:4326')"
        )
    rows = series.index
    geoms = np.asarray(series.array, dtype=object)
    absent = shapely.is_missing(geoms) | shapely.is_empty(geoms)
    if absent.any():
        raise GeometryError(
            f"{int(absent.sum())} exclusion zones from {label} have missing or empty geometry: "
            f"rows {describe_rows(rows[absent])}"
        )
    type_id = shapely.get_type_id(geoms)
    not_polygon = ~np.isin(type_id, _POLYGONS)
    if not_polygon.any():
        kinds = sorted(set(shapely.get_type_id(geoms[not_polygon]).tolist()))
        names = ", ".join(shapely.GeometryType(t).name.lower() for t in kinds)
        raise GeometryError(
            f"exclusion zones must be polygons; {int(not_polygon.sum())} zones from {label} are "
            f"{names}: rows {describe_rows(rows[not_polygon])}"
        )
    notes: list[str] = []
    invalid = ~shapely.is_valid(geoms)
    if invalid.any():
        fixed = polygonal_part(shapely.make_valid(geoms[invalid]))
        geoms = geoms.copy()
        geoms[invalid] = fixed
        notes.append(
            f"repaired {int(invalid.sum())} invalid exclusion zones with shapely.make_valid: "
            f"rows {describe_rows(rows[invalid])}"
        )
    zone_crs = pyproj.CRS(series.crs)
    target = pyproj.CRS(frame.crs)
    if not zone_crs.equals(target, ignore_axis_order=True):
        geoms = np.asarray(gpd.GeoSeries(geoms, crs=zone_crs).to_crs(target).array, dtype=object)
        notes.append(
            f"exclusion zones from {label} were reprojected from {describe_crs(zone_crs)} to "
            f"the units' CRS, {describe_crs(target)}"
        )
    area = shapely.union_all(geoms)
    shapely.prepare(area)
    units = np.asarray(frame.geometry.array, dtype=object)
    hit = shapely.intersects(units, area) if how == "intersects" else shapely.within(units, area)
    verb = "touching" if how == "intersects" else "lying within"
    zones_word = "zone" if len(geoms) == 1 else "zones"
    rule = f"dropped {int(hit.sum()):,} {verb} {len(geoms)} exclusion {zones_word} from {label}"
    return ~hit, rule, notes


def subset_positions(frame: gpd.GeoDataFrame, ids: Any) -> np.ndarray:
    """Positions of ``ids`` in the order given; unknown or repeated ids are refused."""
    wanted = pd.Index([ids] if np.ndim(ids) == 0 else list(ids))
    if len(wanted) == 0:
        raise InputError("subset() needs at least one unit id")
    if wanted.has_duplicates:
        raise InputError(
            f"subset() was given these ids more than once: "
            f"{describe_rows(wanted[wanted.duplicated()].unique())}"
        )
    positions = frame.index.get_indexer(wanted)
    unknown = positions < 0
    if unknown.any():
        raise InputError(
            f"{int(unknown.sum())} ids given to subset() are not units "
            f"(id column {frame.index.name!r}): {describe_rows(wanted[unknown])}"
        )
    return positions
