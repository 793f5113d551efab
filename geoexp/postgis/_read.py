"""Read a PostGIS table or query into a (Geo)DataFrame with clear errors.

The geometry column is found from the types the server reports (``geometry``
or ``geography``), so a query may compute one. A table or query without a
geometry column reads as a plain DataFrame (incidents with x/y columns); units
always need one. The CRS comes from the geometries' SRID; an SRID of 0 reads
as a layer without a CRS, which the units' and incidents' own checks refuse
unless the user names the CRS.
"""

from __future__ import annotations

import geopandas as gpd
import pandas as pd

from geoexp._optional import import_optional
from geoexp.errors import InputError
from geoexp.postgis._source import DatabaseSource, safe_message

_GEOMETRY_TYPES = ("geometry", "geography")


def _geometry_columns(conn, sql: str) -> list[str]:
    """Names of the columns of ``sql`` whose type is PostGIS geometry or geography."""
    sqlalchemy = import_optional("sqlalchemy", "postgis", "Reading from PostGIS")
    oids = {
        int(row[0])
        for row in conn.execute(
            sqlalchemy.text("SELECT oid FROM pg_type WHERE typname IN ('geometry', 'geography')")
        )
    }
    result = conn.exec_driver_sql(f"SELECT * FROM ({sql}) AS geoexp_source LIMIT 0")
    try:
        description = result.cursor.description or []
    finally:
        result.close()
    return [col.name for col in description if col.type_code in oids]


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
    sqlalchemy = import_optional("sqlalchemy", "postgis", "Reading from PostGIS")
    engine = source.connect()
    sql = source.select_sql()
    try:
        with engine.connect() as conn:
            if source.table is not None:
                found = conn.execute(
                    sqlalchemy.text("SELECT to_regclass(:name)"), {"name": source.table}
                ).scalar()
                if found is None:
                    raise InputError(
                        f"the {what} source {source.label} does not exist; tables with "
                        f"geometry there: {_spatial_tables(conn) or 'none'}"
                    )
            columns = _geometry_columns(conn, sql)
            if source.geometry is not None:
                if source.geometry not in columns:
                    raise InputError(
                        f"the {what} source {source.label} has no geometry column "
                        f"{source.geometry!r}; its geometry columns are "
                        f"{', '.join(repr(c) for c in columns) or 'none'}"
                    )
                columns = [source.geometry]
            if len(columns) > 1:
                raise InputError(
                    f"the {what} source {source.label} has {len(columns)} geometry columns "
                    f"({', '.join(repr(c) for c in columns)}); say which with geometry="
                )
            if not columns:
                if need_geometry:
                    raise InputError(f"the {what} source {source.label} has no geometry column")
                return pd.read_sql_query(sqlalchemy.text(sql), conn)
            frame = gpd.read_postgis(sqlalchemy.text(sql), conn, geom_col=columns[0])
    except InputError:
        raise
    except sqlalchemy.exc.SQLAlchemyError as err:
        raise InputError(
            f"could not read the {what} source {source.label}: {safe_message(err, source.url)}"
        ) from None
    finally:
        engine.dispose()
    if columns[0] != "geometry" and "geometry" not in frame.columns:
        frame = frame.rename_geometry("geometry")
    return frame


def _spatial_tables(conn) -> str:
    sqlalchemy = import_optional("sqlalchemy", "postgis", "Reading from PostGIS")
    rows = conn.execute(
        sqlalchemy.text(
            "SELECT f_table_schema, f_table_name FROM geometry_columns ORDER BY 1, 2 LIMIT 20"
        )
    ).all()
    return ", ".join(f"{schema}.{name}" for schema, name in rows)
