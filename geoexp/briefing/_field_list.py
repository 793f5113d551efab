"""The field list: the treated places a patrol visits, numbered as in the briefing pack.

Only treated places are listed. Control and spillover places are left out on
purpose: a list that names them beside the treated ones invites a team to visit
them too, which spoils the comparison. The analyst's list of every eligible unit
with its condition is a separate file (:func:`geoexp.trialfile.export_assignment_csv`).
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

from geoexp._atomic import atomic_path
from geoexp.briefing._load import label_points, load_trial, plan_pages
from geoexp.trialfile import TrialFile

WGS84 = "EPSG:4326"
# Five decimals of a degree are about 1.1 m of latitude: finer than a phone's GPS, and a
# street segment's middle is not a more exact place than that.
DECIMALS = 5


def geo_uri(lat: np.ndarray, lon: np.ndarray, decimals: int = DECIMALS) -> list[str]:
    """``geo:`` URIs (RFC 5870: ``geo:<lat>,<lon>``, WGS 84, the URI's default CRS).

    Mayrhofer & Spanring (2010), RFC 5870 "A Uniform Resource Identifier for
    Geographic Locations ('geo' URI)": latitude first, then longitude, in
    decimal degrees. Phones open such a link in their map or navigation app.

    Parameters
    ----------
    lat, lon : numpy.ndarray
        Latitude and longitude of each place in decimal degrees (WGS 84).
    decimals : int
        Decimal places kept (5 places of a degree is about 1 m).

    Returns
    -------
    list of str
        One URI per place, in input order.
    """
    return [f"geo:{a:.{decimals}f},{o:.{decimals}f}" for a, o in zip(lat, lon, strict=True)]


def field_list(
    trial: TrialFile | str | Path, *, districts: Sequence[str] | None = None
) -> gpd.GeoDataFrame:
    """The treated places for field teams, numbered as in the briefing pack.

    Parameters
    ----------
    trial : TrialFile or path
        A trial file with a drawn assignment.
    districts : sequence of str, optional
        Only these districts (values of the spec's district column).

    Returns
    -------
    geopandas.GeoDataFrame
        One row per treated place, indexed by unit id, in the pack's order:
        ``number`` (the number on the briefing maps), ``district``,
        ``street``, ``description``, ``instructions``, ``lon`` and ``lat``
        (WGS 84, rounded to 5 decimals, about a metre) and ``navigation``
        (an RFC 5870 ``geo:`` link), with point geometry in EPSG:4326 at the
        place's marker on the maps (the middle of a street segment, a point
        inside a parcel).
    """
    data = load_trial(trial)
    plan = plan_pages(data, "a4", districts)
    ids = [uid for d in plan.districts for uid in d.unit_ids]
    numbers = [n for d in plan.districts for n in d.numbers]
    places = data.frame.loc[ids]
    xy = label_points(places.geometry)
    points = gpd.GeoSeries(shapely.points(xy), crs=places.crs).to_crs(WGS84)
    lon = np.round(points.x.to_numpy(), DECIMALS)
    lat = np.round(points.y.to_numpy(), DECIMALS)
    out = pd.DataFrame(
        {
            "number": np.asarray(numbers, dtype=np.int64),
            "district": places["district"].to_numpy(),
            "street": places["street"].to_numpy(),
            "description": places["description"].to_numpy(),
            "instructions": places["instructions"].to_numpy(),
            "lon": lon,
            "lat": lat,
            "navigation": geo_uri(lat, lon),
        },
        index=pd.Index(ids, name=data.trial.id_column),
    )
    return gpd.GeoDataFrame(out, geometry=shapely.points(lon, lat), crs=WGS84)


def save_field_list(
    places: gpd.GeoDataFrame,
    csv: str | Path | None = None,
    geojson: str | Path | None = None,
) -> list[Path]:
    """Write a :func:`field_list` as CSV (for print and spreadsheets) and/or GeoJSON (for phones).

    The GeoJSON is RFC 7946 GeoJSON: points in WGS 84 longitude/latitude with the
    list's columns as properties, which map apps on phones open directly.
    Both writes are atomic.

    Parameters
    ----------
    places : geopandas.GeoDataFrame
        The output of :func:`field_list`.
    csv : path, optional
        CSV file to write (UTF-8; the place number first, then the unit id).
    geojson : path, optional
        GeoJSON file to write; its layer is named after the file.

    Returns
    -------
    list of pathlib.Path
        The files written, CSV first; empty when neither path is given.
    """
    written = []
    if csv is not None:
        table = pd.DataFrame(places.drop(columns="geometry")).reset_index()
        first = ["number", table.columns[0]]  # the map's number, then the unit id
        table = table[first + [c for c in table.columns if c not in first]]
        with atomic_path(csv) as tmp:
            table.to_csv(tmp, index=False, encoding="utf-8")
        written.append(Path(csv))
    if geojson is not None:
        frame = places.reset_index()
        with atomic_path(geojson) as tmp:
            # RFC 7946: WGS 84 longitude/latitude, no "crs" member; the layer is named
            # after the file, not after the temporary copy.
            frame.to_file(
                tmp,
                driver="GeoJSON",
                engine="pyogrio",
                layer=Path(geojson).stem,
                layer_options={"RFC7946": "YES", "WRITE_NAME": "YES"},
            )
        written.append(Path(geojson))
    return written
