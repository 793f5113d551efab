"""Web data encoding: unit and polygon layers as GeoJSON in web coordinates (lon/lat).

The pages embed the units once, as one compact column-wise record that the
page script expands into GeoJSON, and build every switchable layer from it in
the browser, so a page does not grow with the number of layers. Geometry is
simplified to half a metre in the units' CRS and rounded to 6 decimals of a
degree (about 0.1 m) before embedding.
"""

from __future__ import annotations

import json
import re

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import shapely

from geoexp.errors import CRSError
from geoexp.maps._geometry import metres_per_unit
from geoexp.units import describe_crs, is_planar

WGS84 = "EPSG:4326"
SIMPLIFY_M = 0.5
DECIMALS = 6  # 1e-6 degree is about 0.1 m


def refuse_planar(crs) -> None:
    """Refuse a web map of a layer in local planar coordinates, saying why and what to use."""
    if crs is not None and is_planar(crs):
        raise CRSError(
            "web maps (the interactive planning, drawing and results maps) place the units on a "
            f"map of the Earth, but this layer is in {describe_crs(pyproj.CRS(crs))}: it was "
            "declared planar ([units] planar in the spec, planar= in the library, --planar on "
            "the command line) and has no geographic reference. Use the printable briefing pack "
            "(geoexp briefing), whose maps need none, or give the layer its real CRS "
            "([units] crs) instead of planar"
        )


def to_web(geoms: gpd.GeoSeries, tolerance: float) -> np.ndarray:
    """Simplify in the projected CRS, then reproject to lon/lat and round to ~0.1 m."""
    refuse_planar(geoms.crs)
    arr = np.asarray(geoms.array, dtype=object)
    if tolerance > 0:
        arr = shapely.simplify(arr, tolerance, preserve_topology=True)
    web = gpd.GeoSeries(arr, crs=geoms.crs).to_crs(WGS84)
    return shapely.transform(np.asarray(web.array, dtype=object), lambda xy: np.round(xy, DECIMALS))


def feature_collection(geoms: np.ndarray, props: list[dict]) -> dict:
    geo = shapely.to_geojson(geoms)
    return {
        "type": "FeatureCollection",
        "features": [
            {"type": "Feature", "properties": p, "geometry": json.loads(g)}
            for p, g in zip(props, geo, strict=True)
        ],
    }


def unit_dataset(
    frame: gpd.GeoDataFrame,
    description_column: str | None,
    district_column: str | None,
    extra: pd.DataFrame,
    meta: dict,
) -> dict:
    """All units in one compact, column-wise record that the page expands into GeoJSON.

    Coordinates are whole millionths of a degree (about 0.1 m) counted from the
    south-west corner, text repeated across units (districts, conditions) is
    stored once, and probabilities are whole thousandths. This keeps the page
    for a city of a few thousand segments well under a megabyte.
    """
    per_metre = metres_per_unit(frame)
    geoms = to_web(frame.geometry, SIMPLIFY_M / per_metre)
    xy = shapely.get_coordinates(geoms)
    origin = np.floor(xy.min(axis=0) * 10**DECIMALS).astype(np.int64)
    as_int = shapely.transform(geoms, lambda c: np.round(c * 10**DECIMALS) - origin.astype(float))
    text = shapely.to_geojson(as_int)
    types = shapely.get_type_id(geoms)
    coords = [_coordinates_text(t) for t in text]
    out: dict = {
        "origin": origin.tolist(),
        "scale": 10.0**-DECIMALS,
        "t": _GEOJSON_TYPES[int(types[0])]
        if (types == types[0]).all()
        else [_GEOJSON_TYPES[int(t)] for t in types],
        "g": "@@COORDS@@",
        "id": frame.index.astype(str).tolist(),
        "e": extra["e"].astype(int).tolist(),
    }
    if description_column and description_column in frame.columns:
        out["d"] = frame[description_column].fillna("").astype(str).tolist()
    if district_column and district_column in frame.columns:
        codes, names = pd.factorize(frame[district_column].fillna("").astype(str))
        out["ds"], out["dsn"] = codes.tolist(), names.tolist()
    if "c" in extra.columns:
        codes, names = pd.factorize(extra["c"].astype(str))
        out["c"], out["cn"] = codes.tolist(), names.tolist()
    if "p" in extra.columns:
        per_mille = np.round(np.asarray(extra["p"].tolist(), dtype=float) * 1000.0)
        out["p"] = [[None if np.isnan(v) else int(v) for v in row] for row in per_mille]
    # The coordinate arrays are already JSON text; splice them in rather than re-parse.
    body = json.dumps(out, separators=(",", ":"))
    body = body.replace('"@@COORDS@@"', "[" + ",".join(_INT_FLOAT.sub("", c) for c in coords) + "]")
    return {"compact": Raw(body), "meta": meta}


class Raw(str):
    """JSON text to be spliced into the page as it is."""


_COORDS = re.compile(r'"coordinates":(.*)\}$')
_INT_FLOAT = re.compile(r"\.0(?=[,\]])")
_GEOJSON_TYPES = {
    0: "Point",
    1: "LineString",
    3: "Polygon",
    4: "MultiPoint",
    5: "MultiLineString",
    6: "MultiPolygon",
}


def dump(value) -> str:
    """JSON text of the datasets, splicing in pre-built parts."""
    if isinstance(value, Raw):
        return str(value)
    if isinstance(value, dict):
        return "{" + ",".join(f"{json.dumps(k)}:{dump(v)}" for k, v in value.items()) + "}"
    return json.dumps(value, separators=(",", ":"))


def script_safe(text: str) -> str:
    """JSON text safe inside an inline script: "</" cannot appear there; JSON allows "<\\/"."""
    return text.replace("</", "<\\/")


def _coordinates_text(geojson: str) -> str:
    # shapely.to_geojson always writes a "coordinates" member last for these geometry types
    found = _COORDS.search(geojson)
    assert found is not None
    return found.group(1)
