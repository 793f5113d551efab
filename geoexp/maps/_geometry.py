"""Geometry every map shares, web or print: metres per CRS unit, districts, band rings."""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import shapely

from geoexp.errors import CRSError, InputError

# Outlines drawn around a district's own units reach this far beyond them.
OUTLINE_MARGIN_M = 40.0
DISTRICTS_GIVEN = "district boundaries"
DISTRICTS_DRAWN = "district outlines drawn around their units"


def metres_per_unit(frame: gpd.GeoDataFrame | gpd.GeoSeries) -> float:
    """Metres per unit of the frame's projected (or local planar) CRS; refuses a geographic CRS.

    Parameters
    ----------
    frame : geopandas.GeoDataFrame or geopandas.GeoSeries
        A layer with a CRS.

    Returns
    -------
    float
        Metres in one unit of the CRS's first axis (1.0 for metres, 0.3048 for
        international feet).

    Raises
    ------
    geoexp.errors.CRSError
        The CRS is geographic (degrees have no fixed length in metres).
    """
    crs = pyproj.CRS(frame.crs)
    if not (crs.is_projected or crs.is_engineering):
        raise CRSError(f"map layers must be in a projected CRS to draw distances; got {crs.name}")
    return float(crs.axis_info[0].unit_conversion_factor)


def read_polygons(source, what: str, target_crs) -> gpd.GeoDataFrame:
    """Polygons from a file or a GeoDataFrame, in ``target_crs``, with clear errors."""
    if isinstance(source, gpd.GeoDataFrame):
        frame = source
        label = f"the {what} GeoDataFrame"
    else:
        label = repr(str(source))
        if not Path(source).exists():
            raise InputError(f"{what} file {label} does not exist")
        frame = gpd.read_file(source, engine="pyogrio")
    if frame.crs is None:
        raise CRSError(f"the {what} from {label} have no CRS; geoexp does not guess one")
    kinds = set(frame.geom_type.dropna())
    if not kinds <= {"Polygon", "MultiPolygon"}:
        raise InputError(f"the {what} from {label} must be polygons; found {sorted(kinds)}")
    return frame.to_crs(target_crs)


def district_outlines(
    units: gpd.GeoDataFrame,
    column: str | None,
    districts: str | os.PathLike | gpd.GeoDataFrame | None = None,
) -> tuple[gpd.GeoDataFrame | None, str]:
    """The district polygons every geoexp map draws, and a note on where they came from.

    Given ``districts`` (a polygon file or GeoDataFrame), those polygons, named
    by ``column`` when they have it, else by their first text column. Otherwise
    each district's units (grouped by ``column``) are grown by
    ``OUTLINE_MARGIN_M`` metres and dissolved into one outline per district,
    with the holes between streets filled and simplified to a quarter of the
    margin.
    The web maps, the result maps and the briefing pack all call this, so they
    draw the same districts.

    Parameters
    ----------
    units : geopandas.GeoDataFrame
        The units, in a projected or local planar CRS.
    column : str or None
        The units' district column (also the name column looked for in
        ``districts``).
    districts : str, os.PathLike or geopandas.GeoDataFrame, optional
        District polygons to draw instead of outlines grown from the units.

    Returns
    -------
    outlines : geopandas.GeoDataFrame or None
        One polygon per district with a ``name`` column, in the units' CRS
        (given districts reprojected to it); None when neither ``districts``
        nor a ``column`` the units have is given.
    note : str
        Where they came from: :data:`DISTRICTS_GIVEN` or
        :data:`DISTRICTS_DRAWN`, empty with no outlines.
    """
    if districts is not None:
        out = read_polygons(districts, "districts", units.crs)
        name_col = column if column in out.columns else None
        if name_col is None:
            text = [c for c in out.columns if c != out.geometry.name and out[c].dtype == object]
            name_col = text[0] if text else None
        names = (
            out[name_col].astype(str)
            if name_col
            else pd.Series([f"district {i + 1}" for i in range(len(out))], index=out.index)
        )
        frame = gpd.GeoDataFrame(
            {"name": names.to_numpy()}, geometry=out.geometry.to_numpy(), crs=out.crs
        )
        return frame, DISTRICTS_GIVEN
    if column and column in units.columns:
        grown = units.geometry.buffer(OUTLINE_MARGIN_M / metres_per_unit(units), quad_segs=2)
        dissolved = (
            gpd.GeoDataFrame(
                {"name": units[column].astype(str).to_numpy()},
                geometry=grown.to_numpy(),
                crs=units.crs,
            )
            .dissolve(by="name")
            .reset_index()
        )
        # An outline, not a street plan: fill the holes between streets and drop detail
        # finer than a quarter of the margin.
        parts, owner = shapely.get_parts(np.asarray(dissolved.geometry.array), return_index=True)
        filled = shapely.polygons(shapely.get_exterior_ring(parts))
        whole = [
            shapely.union_all(filled[owner == i]).simplify(
                OUTLINE_MARGIN_M / 4 / metres_per_unit(units), preserve_topology=True
            )
            for i in range(len(dissolved))
        ]
        return (
            gpd.GeoDataFrame({"name": dissolved["name"].to_numpy()}, geometry=whole, crs=units.crs),
            DISTRICTS_DRAWN,
        )
    return None, ""


def band_rings(treated: gpd.GeoSeries, bands_m: Sequence[float]) -> np.ndarray:
    """One ring per band: the area within the band's distances of any treated unit."""
    per_metre = metres_per_unit(treated)
    union = shapely.union_all(np.asarray(treated.array, dtype=object))
    outer = [shapely.buffer(union, d / per_metre, quad_segs=6) for d in bands_m]
    inner = [shapely.Polygon()] + outer[:-1]
    return np.array(
        [shapely.difference(o, i) for o, i in zip(outer, inner, strict=True)], dtype=object
    )


def ring_labels(bands: Sequence[float]) -> list[str]:
    """Legend text of each band ring."""
    lows = (0.0, *bands[:-1])
    return [f"within {lo:g}-{hi:g} m of a treated unit" for lo, hi in zip(lows, bands, strict=True)]
