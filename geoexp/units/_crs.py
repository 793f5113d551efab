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
* Local planar coordinates: a layer with no CRS may be *declared* planar, in
  metres or feet (``planar="m"``, ``"ft"``, ``"us-ft"``), instead of being
  given a CRS it does not have. It is then described as "local planar
  coordinates in metres (no CRS)" (stored as an engineering CRS of that name,
  which GeoPackage keeps), never as a real CRS. A local engineering CRS on the
  layer whose axes are in metres or feet (a site grid) is accepted the same
  way and reported by its own name.
* A planar layer has no geographic reference: web maps and longitude/latitude
  inputs are refused for it (:func:`require_geographic_reference`), because
  there is no honest way to place it on the Earth.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import geopandas as gpd
import numpy as np
import pyproj
from pyproj.exceptions import CRSError as PyprojCRSError

from geoexp.errors import CRSError

# One UTM zone is 6 degrees wide; a layer much wider than that is distorted at its edges.
_UTM_ZONE_WIDTH_DEG = 6.0

Planar = Literal["m", "ft", "us-ft"]
# Declared planar units: (words in descriptions, unit name in the CRS, metres per unit).
_PLANAR = {
    "m": ("metres", "metre", 1.0),
    "ft": ("feet", "foot", 0.3048),
    "us-ft": ("US survey feet", "US survey foot", 1200 / 3937),
}
_PLANAR_PREFIX = "local planar coordinates in "
# Axis units a local engineering CRS may have (pyproj names them so).
_LENGTH_UNITS = ("metre", "meter", "foot", "US survey foot", "ft", "m")


def planar_crs(unit: Planar) -> pyproj.CRS:
    """The stand-in CRS of a layer declared planar: a local engineering CRS, no geographic reference.

    Its name, "local planar coordinates in metres (no CRS)" (or feet), is what
    every output shows; it carries no EPSG code and no datum.

    Parameters
    ----------
    unit : {"m", "ft", "us-ft"}
        The unit of the layer's coordinates: metres, international feet
        (0.3048 m) or US survey feet (1200/3937 m).

    Returns
    -------
    pyproj.CRS
        A two-axis Cartesian engineering CRS (easting, northing) in ``unit``,
        with no datum and no EPSG code.

    Raises
    ------
    geoexp.errors.CRSError
        ``unit`` is not one of the three above.
    """
    if unit not in _PLANAR:
        raise CRSError(
            f"planar= must be one of {', '.join(repr(k) for k in _PLANAR)} (the unit of the "
            f"layer's coordinates), got {unit!r}"
        )
    words, name, factor = _PLANAR[unit]
    axis = f'LENGTHUNIT["{name}",{factor!r}]'
    return pyproj.CRS.from_wkt(
        f'ENGCRS["{_PLANAR_PREFIX}{words} (no CRS)",EDATUM["none"],CS[Cartesian,2],'
        f'AXIS["easting (X)",east,ORDER[1],{axis}],AXIS["northing (Y)",north,ORDER[2],{axis}]]'
    )


def is_planar(crs: object) -> bool:
    """True for local planar coordinates: an engineering CRS with no geographic reference.

    Parameters
    ----------
    crs : pyproj.CRS, str, int or None
        Anything :meth:`pyproj.CRS.from_user_input` accepts, or None (no CRS).

    Returns
    -------
    bool
        True if ``crs`` is an engineering CRS (local planar coordinates); False
        for a geographic or projected CRS and for None.
    """
    if crs is None:
        return False
    return bool(pyproj.CRS.from_user_input(crs).is_engineering)


def require_geographic_reference(units: object, what: str) -> None:
    """Refuse ``what`` (a web map, longitude/latitude input) for a layer in local planar coordinates.

    Parameters
    ----------
    units : geoexp.units.UnitSet, GeoDataFrame, GeoSeries, pyproj.CRS or None
        The layer (or its CRS) that ``what`` needs to place on the Earth.
    what : str
        What needs it, in a few words ("a web map", "incidents given as
        longitude/latitude"), used in the message.

    Raises
    ------
    geoexp.errors.CRSError
        The layer is in local planar coordinates (or has no CRS at all).
    """
    crs = getattr(units, "crs", units)
    if crs is None:
        raise CRSError(f"{what} needs a layer with a CRS, but this one has none")
    crs = pyproj.CRS.from_user_input(crs)
    if crs.is_engineering:
        source = getattr(units, "source", None)
        layer = f"the layer '{source}'" if source else "the layer"
        raise CRSError(
            f"{what} cannot be used with {layer}: it is in {describe_crs(crs)}, which has no "
            "geographic reference, so its coordinates cannot be placed on the Earth. Give the "
            "layer in its real CRS (crs=) if it has one, or give every input in the same local "
            "coordinates (x=/y= with crs= the layer's CRS)"
        )


@dataclass(frozen=True)
class CRSResult:
    frame: gpd.GeoDataFrame
    report: str
    metres_per_unit: float
    notes: tuple[str, ...]


def parse_crs(value: object, where: str) -> pyproj.CRS:
    """Turn anything pyproj accepts (``"EPSG:2263"``, 4326, WKT, CRS) into a CRS.

    Parameters
    ----------
    value : object
        The CRS as given.
    where : str
        Where it was given, for the error message.

    Returns
    -------
    pyproj.CRS
        The CRS.

    Raises
    ------
    geoexp.errors.CRSError
        pyproj does not understand ``value``.
    """
    try:
        return pyproj.CRS.from_user_input(value)
    except (PyprojCRSError, TypeError, ValueError) as err:
        raise CRSError(f"{where}: {value!r} is not a CRS pyproj understands ({err})") from err


def describe_crs(crs: pyproj.CRS) -> str:
    """``"WGS 84 (EPSG:4326)"``: the name people recognise plus the code to look up.

    Local planar coordinates are described by their name alone (a declared
    layer: "local planar coordinates in metres (no CRS)"), never with a code.

    Parameters
    ----------
    crs : pyproj.CRS
        The CRS to describe.

    Returns
    -------
    str
        The CRS's name and its authority code in brackets (``"no EPSG code"``
        when it has none); for local planar coordinates the name alone, or the
        name followed by "(local planar coordinates)".
    """
    if crs.is_engineering:
        if crs.name.startswith(_PLANAR_PREFIX):
            return crs.name
        return f"{crs.name} (local planar coordinates)"
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


def _planar_unit(crs: pyproj.CRS, source: str) -> tuple[str, float]:
    """(unit name, metres per unit) of a local engineering CRS, or refuse it."""
    axes = crs.axis_info
    units = {(a.unit_name, float(a.unit_conversion_factor)) for a in axes}
    if len(axes) != 2 or len(units) != 1 or next(iter(units))[0] not in _LENGTH_UNITS:
        found = ", ".join(sorted(f"{a.unit_name}" for a in axes)) or "none"
        raise CRSError(
            f"the layer '{source}' is in {crs.name}, a local engineering CRS, but its axes are "
            f"not two axes in metres or feet (found: {found}); geoexp measures distances only in "
            "metres or feet"
        )
    name, factor = next(iter(units))
    return name, factor


def resolve_crs(
    frame: gpd.GeoDataFrame, crs: object, source: str, planar: Planar | None = None
) -> CRSResult:
    """Apply the module's CRS policy to a private copy ``frame``."""
    given = None if crs is None else parse_crs(crs, f"crs= for '{source}'")
    had = frame.crs
    prefix = ""
    if planar is not None:
        declared = planar_crs(planar)
        if given is not None:
            raise CRSError(
                f"give either crs= or planar= for '{source}', not both: planar= declares a layer "
                "with no CRS to be in local planar coordinates"
            )
        if had is None:
            frame = frame.set_crs(declared)
            report = (
                f"The layer has no CRS and was declared planar: {declared.name}. Distances are "
                f"measured in its own coordinates ({_PLANAR[planar][0]}, converted to metres); "
                "it has no geographic reference, so it cannot be shown on a web map or matched "
                "to longitude/latitude."
            )
            return CRSResult(frame, report, _PLANAR[planar][2], (report,))
        current = pyproj.CRS(had)
        if not current.is_engineering:
            raise CRSError(
                f"the layer '{source}' is in {describe_crs(current)}; planar= is for a layer "
                "with no CRS. Drop planar= (geoexp will not set aside a CRS the file declares)"
            )
        name, factor = _planar_unit(current, source)
        if abs(factor - _PLANAR[planar][2]) > 1e-9 * factor:
            raise CRSError(
                f"the layer '{source}' is in {describe_crs(current)}, in {name}, but planar= "
                f"says {_PLANAR[planar][0]}; drop planar= or correct it"
            )
    if had is None:
        if given is None:
            raise CRSError(
                f"the layer '{source}' has no CRS (coordinate reference system). geoexp does not "
                "guess one: pass it with crs=, e.g. crs='EPSG:4326' for longitude/latitude "
                "or the EPSG code of your city's projected system; or, for coordinates in a "
                "local grid with no CRS, declare them with planar='m' (or 'ft')"
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
    if current.is_engineering:
        name, factor = _planar_unit(current, source)
        kind = (
            "as declared"
            if current.name.startswith(_PLANAR_PREFIX)
            else f"a local engineering CRS in {name} with no geographic reference"
        )
        report = (
            f"The layer is in {describe_crs(current)}, {kind}; kept, distances are measured in "
            "its own coordinates"
            + ("" if factor == 1.0 else f" ({factor!r} metres per {name})")
            + ", and it cannot be shown on a web map or matched to longitude/latitude."
        )
        result = CRSResult(frame, report, factor, (report,))
    elif current.is_geographic:
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
