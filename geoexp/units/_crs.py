"""CRS checks and projection to a metric CRS (DESIGN.md, Conventions; STYLE.md habit 9).

Policy
------
* No CRS on the layer and none given with ``crs=``: refuse. Guessing a CRS from
  coordinate ranges is how trials end up on the wrong continent.
* ``crs=`` given and the layer has a different one: refuse; the same: fine.
* Geographic CRS (degrees): project to the UTM zone of the layer's centre
  (geopandas ``estimate_utm_crs``, which asks pyproj for the zone).
* Mercator-family projections (web maps' Pseudo-Mercator, Mercator variants):
  their "metres" are stretched by 1/cos(latitude) (about 30 % at 40 degrees), so
  they are treated like degrees and projected to UTM too.
* Any other projected CRS is kept; if its unit is not the metre (state plane
  feet), ``metres_per_unit`` carries the conversion from pyproj's axis unit.
"""

from __future__ import annotations

from dataclasses import dataclass

import geopandas as gpd
import numpy as np
import pyproj
from pyproj.exceptions import CRSError as PyprojCRSError

from geoexp.errors import CRSError

# One UTM zone is 6 degrees wide; a layer much wider than that is distorted at its edges.
_UTM_ZONE_WIDTH_DEG = 6.0


@dataclass(frozen=True)
class CRSResult:
    frame: gpd.GeoDataFrame
    report: str
    metres_per_unit: float
    notes: tuple[str, ...]


def parse_crs(value: object, where: str) -> pyproj.CRS:
    """Turn anything pyproj accepts (``"EPSG:2263"``, 4326, WKT, CRS) into a CRS."""
    try:
        return pyproj.CRS.from_user_input(value)
    except (PyprojCRSError, TypeError, ValueError) as err:
        raise CRSError(f"{where}: {value!r} is not a CRS pyproj understands ({err})") from err


def describe_crs(crs: pyproj.CRS) -> str:
    """``"WGS 84 (EPSG:4326)"``: the name people recognise plus the code to look up."""
    authority = crs.to_authority()
    code = f"{authority[0]}:{authority[1]}" if authority else "no EPSG code"
    return f"{crs.name} ({code})"


def _horizontal(crs: pyproj.CRS) -> pyproj.CRS:
    # A compound CRS (e.g. state plane + height) measures distance in its first component.
    if crs.is_compound and crs.sub_crs_list:
        return crs.sub_crs_list[0]
    return crs


def _is_mercator(crs: pyproj.CRS) -> bool:
    operation = _horizontal(crs).coordinate_operation
    method = (operation.method_name if operation is not None else "").lower()
    return "mercator" in method and "transverse" not in method


def _to_utm(frame: gpd.GeoDataFrame, source: str, original: pyproj.CRS, why: str) -> CRSResult:
    try:
        utm = frame.estimate_utm_crs()
    except RuntimeError as err:
        # pyproj finds no UTM zone near the poles (beyond 84N / 80S).
        raise CRSError(
            f"the layer '{source}' is in {describe_crs(original)} ({why}) and no UTM zone "
            f"covers it ({err}); reproject it to a local projected CRS in metres first"
        ) from err
    projected = frame.to_crs(utm)
    report = (
        f"The layer was in {describe_crs(original)}, {why}; it was projected to "
        f"{describe_crs(utm)}, the UTM zone of the layer's centre, so distances are in metres."
    )
    notes = [report]
    lon_lat = frame.to_crs(4326).total_bounds
    width = float(lon_lat[2] - lon_lat[0])
    if np.isfinite(width) and width > _UTM_ZONE_WIDTH_DEG:
        notes.append(
            f"the layer spans {width:.1f} degrees of longitude, wider than one UTM zone "
            f"({_UTM_ZONE_WIDTH_DEG:g} degrees); distances near its edges are distorted, so "
            "consider giving the layer in a projected CRS made for the area"
        )
    return CRSResult(projected, report, 1.0, tuple(notes))


def resolve_crs(frame: gpd.GeoDataFrame, crs: object, source: str) -> CRSResult:
    """Apply the module's CRS policy to a private copy ``frame``."""
    given = None if crs is None else parse_crs(crs, f"crs= for '{source}'")
    had = frame.crs
    prefix = ""
    if had is None:
        if given is None:
            raise CRSError(
                f"the layer '{source}' has no CRS (coordinate reference system). geoexp does not "
                "guess one: pass it with crs=, e.g. crs='EPSG:4326' for longitude/latitude "
                "or the EPSG code of your city's projected system"
            )
        frame = frame.set_crs(given)
        prefix = f"The layer had no CRS; {describe_crs(given)} was taken from crs=. "
    elif given is not None and not pyproj.CRS(had).equals(given, ignore_axis_order=True):
        raise CRSError(
            f"the layer '{source}' is in {describe_crs(pyproj.CRS(had))} but crs= says "
            f"{describe_crs(given)}; drop crs= or reproject the layer (geoexp will not "
            "overwrite a CRS the file declares)"
        )
    current = pyproj.CRS(frame.crs)
    if current.is_geographic:
        result = _to_utm(frame, source, current, "a geographic CRS in degrees")
    elif _is_mercator(current):
        result = _to_utm(
            frame,
            source,
            current,
            "a Mercator projection whose lengths grow with latitude",
        )
    elif current.is_projected:
        axis = _horizontal(current).axis_info[0]
        factor = float(axis.unit_conversion_factor)
        if factor == 1.0:
            report = f"The layer is in {describe_crs(current)}, a projected CRS in metres; kept."
        else:
            report = (
                f"The layer is in {describe_crs(current)}, a projected CRS in {axis.unit_name}; "
                f"kept, and lengths are converted with {factor!r} metres per {axis.unit_name}."
            )
        result = CRSResult(frame, report, factor, (report,))
    else:
        raise CRSError(
            f"the layer '{source}' is in {describe_crs(current)}, which is neither geographic "
            "nor projected; give it in longitude/latitude or a projected CRS"
        )
    if prefix:
        return CRSResult(
            result.frame,
            prefix + result.report,
            result.metres_per_unit,
            (prefix + result.report,) + result.notes[1:],
        )
    return result
