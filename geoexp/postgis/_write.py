"""Write frames as PostGIS tables, all or none, never over an existing table unless asked.

Every table of one call is written in one transaction: a failure part way
leaves the database as it was. pandas' types map to PostgreSQL's: text →
``text``, whole numbers → ``bigint``, real numbers → ``double precision``,
true/false → ``boolean``; a GeoDataFrame's geometry becomes a PostGIS
``geometry`` column with the frame's SRID (GeoAlchemy2).
"""

from __future__ import annotations

import re
from collections.abc import Mapping

import geopandas as gpd
import pandas as pd

from geoexp._optional import import_optional
from geoexp.errors import InputError
from geoexp.postgis._source import connect, mask_url, safe_message

_PLAIN_NAME = re.compile(r"^[a-z_][a-z0-9_]{0,62}$")


def check_name(name: str, what: str) -> str:
    """Refuse names that plain SQL would need to quote (lower case letters, digits, ``_``).

    Parameters
    ----------
    name : str
        A schema, table or column name.
    what : str
        Words for the name in the error message (e.g. ``"table"``).

    Returns
    -------
    str
        ``name`` unchanged.

    Raises
    ------
    geoexp.errors.InputError
        Not a name of lower-case letters, digits and ``_`` starting with a
        letter or ``_``, at most 63 characters.
    """
    if not isinstance(name, str) or not _PLAIN_NAME.match(name):
        raise InputError(
            f"{what} {name!r} is not a plain SQL name: use lower-case letters, digits and _, "
            "starting with a letter or _, at most 63 characters"
        )
    return name


def write_tables(
    url: str,
    tables: Mapping[str, pd.DataFrame],
    *,
    schema: str = "public",
    replace: bool = False,
) -> list[str]:
    """Write each frame as table ``schema.name`` in one transaction.

    Parameters
    ----------
    url : str
        libpq connection URL of the database (``postgresql://...``).
    tables : mapping of str to DataFrame
        Table name → rows. Names must be plain SQL names. A GeoDataFrame is
        written with its geometry as a PostGIS ``geometry`` column.
    schema : str
        Schema to write into; created if missing.
    replace : bool
        Replace tables that exist. Without it, an existing table is an error
        and nothing is written.

    Returns
    -------
    list of str
        The qualified names written, ``schema.name``.
    """
    sqlalchemy = import_optional("sqlalchemy", "postgis", "Writing to PostGIS")
    check_name(schema, "schema")
    for name in tables:
        check_name(name, "table name")
    engine = connect(url)
    written = []
    try:
        with engine.begin() as conn:
            existing = set(sqlalchemy.inspect(conn).get_table_names(schema=schema))
            clash = sorted(set(tables) & existing)
            if clash and not replace:
                raise InputError(
                    f"the database {mask_url(url)} already has "
                    f"{', '.join(f'{schema}.{n}' for n in clash)}; geoexp does not write over "
                    "a table unless asked (replace=True, or --replace on the command line), "
                    "or choose another schema or prefix"
                )
            conn.execute(sqlalchemy.text(f"CREATE SCHEMA IF NOT EXISTS {schema}"))
            for name, frame in tables.items():
                if name in existing:
                    conn.execute(sqlalchemy.text(f"DROP TABLE {schema}.{name}"))
                if isinstance(frame, gpd.GeoDataFrame):
                    frame.to_postgis(name, conn, schema=schema, if_exists="fail", index=False)
                else:
                    frame.to_sql(name, conn, schema=schema, if_exists="fail", index=False)
                written.append(f"{schema}.{name}")
    except InputError:
        raise
    except (sqlalchemy.exc.SQLAlchemyError, ValueError) as err:
        raise InputError(
            f"could not write tables to the database {mask_url(url)}: {safe_message(err, url)}; "
            "nothing was written"
        ) from None
    finally:
        engine.dispose()
    return written
