"""Validate a unit layer: ids, geometry kinds, empty and invalid geometry.

Policy (each failure raises with the file, the column and up to ten rows):

* ids: missing (null, NaN, blank text), duplicated, of mixed types, or
  fractional numbers are refused. Integer-valued decimals (a shapefile stores an
  integer column with gaps as decimals) become integers, with a note.
* geometry: missing or empty geometry is refused; points are refused (units are
  street segments or parcels); lines and polygons mixed in one layer are refused.
* invalid polygons are repaired with ``shapely.make_valid`` and only the
  polygonal part is kept (a bow-tie parcel stays a parcel, never a line); a
  polygon whose repair has no area left is refused.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

from geoexp.errors import GeometryError, InputError, describe_rows
from geoexp.units._crs import Planar, resolve_crs

Kind = Literal["segment", "parcel"]

# shapely.get_type_id codes
_POINTS = (0, 4)
_LINES = (1, 2, 5)
_POLYGONS = (3, 6)
_COLLECTION = 7
_POLYGON = 3


@dataclass(frozen=True)
class Prepared:
    frame: gpd.GeoDataFrame
    kind: Kind
    crs_report: str
    metres_per_unit: float
    repaired: int
    notes: tuple[str, ...]


def _rows_phrase(rows: pd.Index, from_file: bool) -> str:
    where = " (counting features from 0 in file order)" if from_file else ""
    return f"rows {describe_rows(rows)}{where}"


def _clean_ids(
    values: pd.Series, column: str, source: str, rows: pd.Index, from_file: bool
) -> tuple[pd.Index, list[str]]:
    notes: list[str] = []
    where = f"column {column!r} of '{source}'"
    missing = values.isna().to_numpy(dtype=bool, copy=True)
    if values.dtype == object or isinstance(values.dtype, pd.StringDtype):
        blank = values.str.strip().eq("").fillna(False).to_numpy(dtype=bool)
        missing |= blank
    if missing.any():
        hint = ""
        if values.dtype.kind == "f":
            hint = (
                "; the column was read as decimal numbers, which is how shapefiles store an "
                "integer column with gaps"
            )
        raise InputError(
            f"{int(missing.sum())} units have no id in {where} (missing, NaN or empty text): "
            f"{_rows_phrase(rows[missing], from_file)}{hint}"
        )

    inferred = pd.api.types.infer_dtype(values, skipna=False)
    if inferred == "integer":
        values = values.astype(np.int64)
    elif inferred in ("floating", "mixed-integer-float"):
        numbers = values.to_numpy(dtype=np.float64)
        fractional = ~np.isfinite(numbers) | (np.floor(numbers) != numbers)
        if fractional.any():
            raise InputError(
                f"ids in {where} must be integers or text; {int(fractional.sum())} are "
                f"fractional numbers: {_rows_phrase(rows[fractional], from_file)}"
            )
        values = pd.Series(numbers.astype(np.int64), index=values.index)
        notes.append(
            f"ids in {where} were stored as decimal numbers (as shapefiles do for integer "
            "columns with gaps); they are whole numbers and are used as integers"
        )
    elif inferred in ("mixed", "mixed-integer"):
        kinds = values.map(lambda v: type(v).__name__)
        usual = kinds.mode().iloc[0]
        odd = (kinds != usual).to_numpy()
        raise InputError(
            f"ids in {where} mix types (mostly {usual}, but "
            f"{', '.join(sorted(set(kinds[odd])))} at {_rows_phrase(rows[odd], from_file)}); "
            "make them all integers or all text"
        )
    elif inferred != "string":
        raise InputError(f"ids in {where} must be integers or text, not {inferred} values")

    duplicated = values.duplicated(keep=False).to_numpy()
    if duplicated.any():
        repeated = pd.unique(values[duplicated])
        raise InputError(
            f"{len(repeated)} ids appear more than once in {where}: {describe_rows(repeated)}; "
            f"{_rows_phrase(rows[duplicated], from_file)}"
        )
    return pd.Index(values, name=column), notes


def polygonal_part(geoms: np.ndarray) -> np.ndarray:
    """Keep only the polygons of each geometry; no polygon left gives an empty geometry."""
    parts, owner = shapely.get_parts(geoms, return_index=True)
    # make_valid may nest a MultiPolygon inside a GeometryCollection: flatten twice.
    parts, second = shapely.get_parts(parts, return_index=True)
    owner = owner[second]
    keep = shapely.get_type_id(parts) == _POLYGON
    out = np.full(len(geoms), shapely.from_wkt("MULTIPOLYGON EMPTY"), dtype=object)
    if keep.any():
        # shapely.multipolygons wants the owners in increasing order; get_parts gives them so.
        out = shapely.multipolygons(parts[keep], indices=owner[keep], out=out)
    single = shapely.get_num_geometries(out) == 1
    out[single] = shapely.get_geometry(out[single], 0)
    return out


def _check_geometry(
    geoms: np.ndarray, ids: pd.Index, source: str, kind: Kind | None
) -> tuple[Kind, np.ndarray, int, list[str]]:
    notes: list[str] = []

    def named(mask: np.ndarray) -> str:
        return f"ids {describe_rows(ids[mask])}"

    absent = shapely.is_missing(geoms) | shapely.is_empty(geoms)
    if absent.any():
        raise GeometryError(
            f"{int(absent.sum())} units in '{source}' have missing or empty geometry: "
            f"{named(absent)}"
        )
    type_id = shapely.get_type_id(geoms)
    points = np.isin(type_id, _POINTS)
    if points.any():
        raise GeometryError(
            f"units must be street segments (lines) or parcels (polygons), but "
            f"{int(points.sum())} units in '{source}' are points: {named(points)}"
        )
    collections = type_id == _COLLECTION
    if collections.any():
        raise GeometryError(
            f"{int(collections.sum())} units in '{source}' are geometry collections; units "
            f"must be street segments (lines) or parcels (polygons): {named(collections)}"
        )
    lines = np.isin(type_id, _LINES)
    polygons = np.isin(type_id, _POLYGONS)
    if lines.any() and polygons.any():
        fewer, label = (lines, "lines") if lines.sum() <= polygons.sum() else (polygons, "polygons")
        raise GeometryError(
            f"'{source}' mixes {int(lines.sum())} lines and {int(polygons.sum())} polygons; a "
            f"layer holds either street segments or parcels. The {label}: {named(fewer)}"
        )
    found: Kind = "segment" if lines.any() else "parcel"
    if kind is not None and kind != found:
        raise GeometryError(
            f"kind={kind!r} was asked for, but '{source}' holds "
            f"{'lines (street segments)' if found == 'segment' else 'polygons (parcels)'}"
        )

    repaired = 0
    if found == "parcel":
        invalid = ~shapely.is_valid(geoms)
        if invalid.any():
            fixed = polygonal_part(shapely.make_valid(geoms[invalid]))
            lost = shapely.is_empty(fixed)
            if lost.any():
                bad = np.flatnonzero(invalid)[lost]
                raise GeometryError(
                    f"{int(lost.sum())} invalid polygons in '{source}' have no area left after "
                    f"repair with shapely.make_valid: ids {describe_rows(ids[bad])}"
                )
            geoms = geoms.copy()
            geoms[invalid] = fixed
            repaired = int(invalid.sum())
            notes.append(
                f"repaired {repaired} invalid polygons with shapely.make_valid, keeping only "
                f"their polygonal part: {named(invalid)}"
            )
    return found, geoms, repaired, notes


def prepare(
    frame: gpd.GeoDataFrame,
    id_column: str | None,
    *,
    crs: object,
    source: str,
    kind: Kind | None,
    from_file: bool,
    planar: Planar | None = None,
) -> Prepared:
    """Validate ``frame`` and return a private, projected, id-indexed copy with its report."""
    if not isinstance(frame, gpd.GeoDataFrame):
        raise InputError(
            f"units must be a geopandas GeoDataFrame, got {type(frame).__name__} from '{source}'"
        )
    if kind is not None and kind not in ("segment", "parcel"):
        raise InputError(f"kind must be 'segment', 'parcel' or None, got {kind!r}")
    try:
        geom_name = frame.geometry.name
    except AttributeError as err:
        raise GeometryError(f"'{source}' has no active geometry column") from err
    if len(frame) == 0:
        raise InputError(f"'{source}' has no features")

    if id_column is None:
        ids_raw = frame.index.to_series(index=pd.RangeIndex(len(frame)))
        id_name = frame.index.name if frame.index.name is not None else "id"
        rows = pd.RangeIndex(len(frame))
        attrs = frame.drop(columns=[geom_name])
    else:
        if id_column not in frame.columns or id_column == geom_name:
            present = [c for c in frame.columns if c != geom_name]
            near = [
                c
                for c in present
                if str(c).lower() == id_column.lower()
                # shapefile field names are cut to 10 characters
                or (len(str(c)) == 10 and id_column.lower().startswith(str(c).lower()))
            ]
            hint = f"; did you mean {describe_rows(near)}?" if near else ""
            raise InputError(
                f"'{source}' has no id column {id_column!r}; its columns are "
                f"{describe_rows(present, limit=len(present)) or 'none'}{hint}"
            )
        ids_raw = frame[id_column].reset_index(drop=True)
        id_name = id_column
        rows = frame.index
        attrs = frame.drop(columns=[geom_name, id_column])
    if "geometry" in attrs.columns:
        raise InputError(
            f"'{source}' has an attribute column named 'geometry' besides its geometry column "
            f"{geom_name!r}; rename one of them"
        )

    ids, notes = _clean_ids(ids_raw, id_name, source, rows, from_file)
    geoms = np.asarray(frame.geometry.array, dtype=object)
    found, geoms, repaired, geom_notes = _check_geometry(geoms, ids, source, kind)

    # drop() above already copied the attributes; a deep copy keeps nothing shared with the caller.
    attrs = attrs.copy(deep=True).set_axis(ids, axis=0)
    private = gpd.GeoDataFrame(attrs, geometry=gpd.GeoSeries(geoms, index=ids), crs=frame.crs)
    projected = resolve_crs(private, crs, source, planar)

    what = "street segments" if found == "segment" else "parcels"
    notes = [f"read {len(ids):,} {what} from '{source}' with ids from {id_name!r}", *notes]
    return Prepared(
        frame=projected.frame,
        kind=found,
        crs_report=projected.report,
        metres_per_unit=projected.metres_per_unit,
        repaired=repaired,
        notes=(*notes, *geom_notes, *projected.notes),
    )
