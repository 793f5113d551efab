"""The invented city of Quillmere: street segments, parcels, districts and incidents.

Quillmere is generated, not surveyed. Its streets form an irregular, gently bent
grid cut by a river (the Quill River, crossed by four bridges), a rail line (the
Tansy Line, crossed in four places) and a diagonal avenue. Every name in it is
invented. The city sits on the open South Atlantic in EPSG:32727 so that no real
place lies under it when it is drawn on a web map.

The generator works on a small street graph (node coordinates plus edges that
know their street and their position along it) and only turns it into
geometries at the end, so that segments of one street share endpoints exactly
and the network is noded wherever streets meet.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import shapely

from geoexp._atomic import atomic_path
from geoexp._rng import as_seed_sequence
from geoexp.errors import InputError
from geoexp.sampleregion._land import (
    _district_of,
    _districts,
    _incidents,
    _parcels,
    _segment_land_use,
)
from geoexp.sampleregion._settings import (
    AVENUE_NAME,
    CRS,
    DEFAULT_PATH,
    DEFAULT_SEED,
    LAYERS,
    RAIL_NAME,
    RIVER_NAME,
)
from geoexp.sampleregion._streets import (
    _layout,
    _segments_from_graph,
    _street_graph,
)

__all__ = ["SampleRegion", "load_sample_region", "make_city"]


@dataclass(frozen=True, eq=False)
class SampleRegion:
    """An invented city to try geoexp on.

    Attributes
    ----------
    segments : geopandas.GeoDataFrame
        Street segments (LineString) between consecutive intersections, with
        columns ``segment_id``, ``street``, ``from_street``, ``to_street``,
        ``description``, ``district``, ``length_m``, ``land_use``,
        ``incidents_y1`` and ``incidents_y2``.
    parcels : geopandas.GeoDataFrame
        Parcels (Polygon) with ``parcel_id``, ``land_use``, ``district`` and
        ``address``.
    districts : geopandas.GeoDataFrame
        District polygons with column ``district``.
    incidents : geopandas.GeoDataFrame
        Incident points with ``incident_id``, ``date`` and ``incident_type``.
    features : geopandas.GeoDataFrame
        Context features (the river polygon and the rail line) with ``kind`` and
        ``name``.
    name : str
        Name of the city.
    path : str or None
        File the region was read from, or None if it was generated.
    """

    segments: gpd.GeoDataFrame
    parcels: gpd.GeoDataFrame
    districts: gpd.GeoDataFrame
    incidents: gpd.GeoDataFrame
    features: gpd.GeoDataFrame
    name: str = "Quillmere"
    path: str | None = None

    def __repr__(self) -> str:
        return (
            f"SampleRegion({self.name!r}: {len(self.segments):,} segments, "
            f"{len(self.parcels):,} parcels, {len(self.districts)} districts, "
            f"{len(self.incidents):,} incidents, path={self.path!r})"
        )


# ----------------------------------------------------------------------------
# public entry points


def make_city(seed: int = DEFAULT_SEED, *, n_segments_target: int = 3500) -> SampleRegion:
    """Generate the invented city of Quillmere from a seed.

    The same seed gives the same city on any machine: all randomness comes from
    child streams of one ``numpy.random.SeedSequence`` and nothing depends on
    set or dict iteration order.

    Parameters
    ----------
    seed : int, default 20261202
        Seed of the generator; the default reproduces the shipped file.
    n_segments_target : int, default 3500
        Approximate number of street segments; the grid is sized to land near it.

    Returns
    -------
    SampleRegion
        Layers in EPSG:32727 (metres). ``segments.incidents_y1`` and
        ``incidents_y2`` are the counts of 2024 and 2025 incidents whose nearest
        segment within 30 m is that segment, computed from the incident points
        themselves (so they agree exactly with snapping the ``incidents`` layer
        with a 30 m tolerance; points further than 30 m from every street are
        counted nowhere).
    """
    if int(n_segments_target) < 200:
        raise InputError(f"n_segments_target must be at least 200, got {n_segments_target}")
    streams = as_seed_sequence(seed).spawn(6)
    rngs = [np.random.default_rng(s) for s in streams]
    layout = _layout(rngs[0], int(n_segments_target))
    graph = _street_graph(layout, rngs[1])
    segments = _segments_from_graph(graph, layout)
    districts = _districts(layout, segments, rngs[2])
    # parcels keep clear of the avenue and the bridges as built (these do not
    # follow the grid's block edges), of the rail corridor and of the river
    seg_geom = segments.geometry.values
    off_grid = (segments["street"].to_numpy() == AVENUE_NAME) | shapely.intersects(
        seg_geom, shapely.union(layout.river, layout.rail)
    )
    carve = shapely.union_all(
        [
            shapely.buffer(shapely.union_all(seg_geom[off_grid]), 9.0),
            shapely.buffer(layout.rail, 14.0),
            layout.river,
        ]
    )
    parcels = _parcels(layout, rngs[3], carve)
    parcels["district"] = _district_of(parcels.geometry.representative_point(), districts)
    segments["district"] = _district_of(
        segments.geometry.interpolate(0.5, normalized=True), districts
    )
    segments["land_use"] = _segment_land_use(segments, parcels)
    incidents, y1, y2 = _incidents(segments, parcels, layout, rngs[4])
    segments["incidents_y1"] = y1
    segments["incidents_y2"] = y2
    features = gpd.GeoDataFrame(
        {"kind": ["river", "rail"], "name": [RIVER_NAME, RAIL_NAME]},
        geometry=[layout.river, layout.rail],
        crs=CRS,
    )
    return _normalise(
        SampleRegion(
            segments=segments,
            parcels=parcels,
            districts=districts,
            incidents=incidents,
            features=features,
        )
    )


def load_sample_region(path: str | Path | None = None) -> SampleRegion:
    """Load the Quillmere sample region.

    Parameters
    ----------
    path : str or pathlib.Path, optional
        A GeoPackage with the layers ``segments``, ``parcels``, ``districts``,
        ``incidents`` and ``features``. By default the file shipped in the
        repository's ``sample_regions`` folder; if that file is absent (geoexp
        installed without the repository) the city is regenerated with
        :func:`make_city` and the default seed, which gives the same data.

    Returns
    -------
    SampleRegion
    """
    if path is None:
        if not DEFAULT_PATH.exists():
            return make_city()
        path = DEFAULT_PATH
    path = Path(path)
    if not path.exists():
        raise InputError(f"sample region file {str(path)!r} does not exist")
    present = {name for name, _ in pyogrio.list_layers(path)}
    missing = [layer for layer in LAYERS if layer not in present]
    if missing:
        raise InputError(f"sample region file {str(path)!r} lacks the layers {missing}")
    frames = {
        layer: gpd.read_file(path, layer=layer, engine="pyogrio", fid_as_index=False)
        for layer in LAYERS
    }
    return _normalise(SampleRegion(**frames, path=str(path)))


def write_sample_region(region: SampleRegion, path: str | Path) -> Path:
    """Write ``region`` to a GeoPackage, one layer per frame, atomically.

    Parameters
    ----------
    region : SampleRegion
        The invented region (the fictional city of Quillmere), one frame per
        layer.
    path : str or pathlib.Path
        The GeoPackage to write (replaced atomically if it exists).

    Returns
    -------
    pathlib.Path
        ``path``.
    """
    path = Path(path)
    with atomic_path(path) as tmp:
        for layer in LAYERS:
            frame = getattr(region, layer)
            # no spatial index: it would double the file and the layers are small
            frame.to_file(tmp, layer=layer, driver="GPKG", engine="pyogrio", SPATIAL_INDEX="NO")
    return path


# ----------------------------------------------------------------------------
# layout: the shape of the city in a local frame, placed in the world


_COLUMNS = {
    "segments": (
        "segment_id",
        "street",
        "from_street",
        "to_street",
        "description",
        "district",
        "length_m",
        "land_use",
        "incidents_y1",
        "incidents_y2",
    ),
    "parcels": ("parcel_id", "land_use", "district", "address"),
    "districts": ("district",),
    "incidents": ("incident_id", "date", "incident_type"),
    "features": ("kind", "name"),
}
_INTS = ("incidents_y1", "incidents_y2")


def _normalise(region: SampleRegion) -> SampleRegion:
    """Give generated and loaded layers the same columns, dtypes and index."""
    out = {}
    for layer, columns in _COLUMNS.items():
        frame = getattr(region, layer)
        data = {}
        for col in columns:
            values = frame[col]
            if col == "date":
                data[col] = pd.to_datetime(values).dt.normalize().astype("datetime64[ns]")
            elif col == "length_m":
                data[col] = values.astype("float64")
            elif col in _INTS:
                data[col] = values.astype("int64")
            else:
                data[col] = values.astype("str")
        out[layer] = gpd.GeoDataFrame(
            pd.DataFrame(data).reset_index(drop=True),
            geometry=gpd.GeoSeries(frame.geometry.values, crs=CRS).reset_index(drop=True),
            crs=CRS,
        )
    return SampleRegion(**out, name=region.name, path=region.path)
