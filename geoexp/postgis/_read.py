"""Read a PostGIS table or query into a (Geo)DataFrame with clear errors.

The rows are read through psycopg alone, in a read-only transaction, and the
SQL is sent as written (no placeholder processing, so ``LIKE 'W%'`` and
``'12:30'`` mean what they say). Columns become pandas columns as
``pandas.read_sql`` would make them. The geometry column is found from the
types the server reports (``geometry`` or ``geography``), so a query may
compute one. A table or query without a geometry column reads as a plain
DataFrame (incidents with x/y columns); units always need one. The CRS comes
from the geometries' SRID; an SRID of 0 reads as a layer without a CRS, which
the units' and incidents' own checks refuse unless the user names the CRS.
"""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

from geoexp._optional import import_optional
from geoexp.errors import InputError
from geoexp.postgis._source import DatabaseSource, open_connection, safe_message


def read_source(
    source: DatabaseSource, what: str, *, need_geometry: bool = True
) -> gpd.GeoDataFrame | pd.DataFrame:
    """Read every row of ``source``; ``what`` names its role ("units", "incidents") in messages.

    Parameters
    ----------
    source : DatabaseSource
        The table or query.
    what : str
        Role of the rows, used in messages.
    need_geometry : bool
        Refuse a source without a geometry column (units); otherwise such a
        source reads as a plain DataFrame.

    Returns
    -------
    geopandas.GeoDataFrame or pandas.DataFrame
        Rows in the order the server returned them; the geometry column is
        named ``geometry`` unless the source has another column of that name.
    """
    psycopg = import_optional("psycopg", "postgis", "Reading from PostGIS")
    conn = open_connection(source.url)
    try:
        conn.read_only = True  # reading a source never changes the database
        with conn.cursor() as cur:
            if source.table is not None:
                cur.execute("SELECT to_regclass(%s)", [source.table.strip()])
                if cur.fetchone()[0] is None:
                    raise InputError(
                        f"the {what} source {source.label} does not exist; tables with "
                        f"geometry there: {_spatial_tables(cur) or 'none'}"
                    )
            cur.execute("SELECT oid FROM pg_type WHERE typname IN ('geometry', 'geography')", None)
            geometry_oids = {int(row[0]) for row in cur.fetchall()}
            cur.execute(source.select_sql(), None)
            names = [col.name for col in cur.description]
            spatial = [col.name for col in cur.description if col.type_code in geometry_oids]
            rows = cur.fetchall()
    except psycopg.Error as err:
        raise InputError(
            f"could not read the {what} source {source.label}: {safe_message(err, source.url)}"
        ) from None
    finally:
        conn.close()
    if len(set(names)) != len(names):
        twice = sorted({n for n in names if names.count(n) > 1})
        raise InputError(
            f"the {what} source {source.label} has more than one column named "
            f"{', '.join(repr(n) for n in twice)}; rename them in the query"
        )
    if source.geometry is not None:
        if source.geometry not in spatial:
            raise InputError(
                f"the {what} source {source.label} has no geometry column "
                f"{source.geometry!r}; its geometry columns are "
                f"{', '.join(repr(c) for c in spatial) or 'none'}"
            )
        spatial = [source.geometry]
    if len(spatial) > 1:
        raise InputError(
            f"the {what} source {source.label} has {len(spatial)} geometry columns "
            f"({', '.join(repr(c) for c in spatial)}); say which with geometry="
        )
    # the same conversion pandas.read_sql makes (numeric → float among others)
    frame = pd.DataFrame.from_records(rows, columns=names, coerce_float=True)
    if not spatial:
        if need_geometry:
            raise InputError(f"the {what} source {source.label} has no geometry column")
        return frame
    return _with_geometry(frame, spatial[0], source, what)


def _with_geometry(
    frame: pd.DataFrame, column: str, source: DatabaseSource, what: str
) -> gpd.GeoDataFrame:
    # psycopg hands PostGIS values over as hex EWKB text, SRID included
    values = frame[column].to_numpy(dtype=object)
    geoms = shapely.from_wkb(np.where(pd.isna(values), None, values))
    srids = np.unique(shapely.get_srid(geoms[~shapely.is_missing(geoms)]))
    if len(srids) > 1:
        raise InputError(
            f"the {what} source {source.label} mixes SRIDs "
            f"{', '.join(str(s) for s in srids)} in column {column!r}; transform them to one "
            "(ST_Transform) in a query"
        )
    crs = None if len(srids) == 0 or srids[0] == 0 else f"EPSG:{int(srids[0])}"
    name = column if column != "geometry" and "geometry" in frame.columns else "geometry"
    columns = {c: frame[c] for c in frame.columns if c != column}
    columns[name] = gpd.GeoSeries(geoms, index=frame.index, crs=crs)
    # keep the source's column order, geometry where it was
    order = [name if c == column else c for c in frame.columns]
    return gpd.GeoDataFrame(pd.DataFrame(columns)[order], geometry=name, crs=crs)


def _spatial_tables(cur) -> str:
    cur.execute(
        "SELECT f_table_schema, f_table_name FROM geometry_columns ORDER BY 1, 2 LIMIT 20",
        None,
    )
    return ", ".join(f"{schema}.{name}" for schema, name in cur.fetchall())
