"""Read a layer from a GeoPackage, GeoJSON, Shapefile or PostGIS table with clear errors.

Every failure names the file; a wrong or missing layer name lists the layers
the file has, so the user never has to open it in a GIS to find out.
"""

from __future__ import annotations

import os
from pathlib import Path

import geopandas as gpd
import pyogrio
from pyogrio.errors import DataLayerError, DataSourceError

from geoexp.errors import InputError
from geoexp.postgis import DatabaseSource, is_database_url, read_source


def database_source(path: object, layer: str | None) -> DatabaseSource | None:
    """The database source ``path`` names (a URL or a DatabaseSource), or None for a file.

    With a URL, ``layer`` names the table (``schema.name``) unless the URL does.

    Parameters
    ----------
    path : object
        A file path, a ``postgresql://`` URL or a DatabaseSource.
    layer : str, optional
        Table of a URL; must be None for a DatabaseSource.

    Returns
    -------
    DatabaseSource or None
        The source, or None when ``path`` is a file.
    """
    if isinstance(path, DatabaseSource):
        if layer is not None:
            raise InputError(f"give the table of {path.label} in the source, not as layer=")
        return path
    if is_database_url(path):
        return DatabaseSource.parse(path, table=layer)
    return None


def read_layer(path: str | os.PathLike, layer: str | None, what: str) -> gpd.GeoDataFrame:
    """Read one layer of ``path`` with pyogrio; ``what`` names the layer's role in messages.

    A ``postgresql://`` URL or a DatabaseSource is read from the database instead.

    Parameters
    ----------
    path : path
        File, ``postgresql://`` URL or DatabaseSource.
    layer : str, optional
        Layer of the file; needed when the file has more than one layer with geometry.
    what : str
        The layer's role (e.g. ``"units"``), for the messages.

    Returns
    -------
    geopandas.GeoDataFrame
        The layer as read.

    Raises
    ------
    geoexp.errors.InputError
        A missing or unreadable file, an unknown layer, or no ``layer`` for a
        file with several layers with geometry.
    """
    database = database_source(path, layer)
    if database is not None:
        return read_source(database, what)
    text = os.fspath(path)
    if not Path(text).exists():
        raise InputError(f"the {what} file '{text}' does not exist")
    try:
        all_layers = pyogrio.list_layers(text)
    except (DataSourceError, DataLayerError, OSError) as err:
        raise InputError(f"could not read the {what} file '{text}': {err}") from err
    spatial = [str(name) for name, geom_type in all_layers if geom_type is not None]
    names = [str(name) for name, _ in all_layers]
    if layer is None:
        if len(spatial) > 1:
            # pyogrio would silently take the first layer; picking the wrong one gives a
            # plausible but wrong trial, so ask instead.
            raise InputError(
                f"the {what} file '{text}' has {len(spatial)} layers with geometry "
                f"({', '.join(repr(s) for s in spatial)}); say which one with layer="
            )
        if not spatial:
            raise InputError(
                f"the {what} file '{text}' has no layer with geometry "
                f"(layers: {', '.join(repr(s) for s in names) or 'none'})"
            )
        layer = spatial[0]
    elif layer not in names:
        raise InputError(
            f"the {what} file '{text}' has no layer {layer!r}; its layers are "
            f"{', '.join(repr(s) for s in names) or 'none'}"
        )
    try:
        frame = gpd.read_file(text, layer=layer, engine="pyogrio")
    except (DataSourceError, DataLayerError, OSError) as err:
        raise InputError(
            f"could not read layer {layer!r} of the {what} file '{text}': {err}"
        ) from err
    if not isinstance(frame, gpd.GeoDataFrame) or frame.geometry is None:
        raise InputError(f"layer {layer!r} of the {what} file '{text}' has no geometry column")
    return frame
