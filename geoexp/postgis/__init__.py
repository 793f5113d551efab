"""PostGIS in and out: read units and incidents from a database, write a trial's tables back.

A source is a libpq URL naming a table or a query::

    postgresql://analyst@db.example/city?table=gis.street_segments
    postgresql:///city?service=agency&query=SELECT%20*%20FROM%20gis.calls

:class:`DatabaseSource` holds one (``DatabaseSource.parse(url)``, or
``DatabaseSource(url, table=...)`` / ``query=...`` with the SQL as plain
text); :func:`read_source` reads it into a GeoDataFrame; :func:`write_tables`
writes frames as tables in one transaction and never over an existing table
unless asked. Passwords are left to libpq (``PGPASSWORD``, ``~/.pgpass``, a
service file); one written in a URL still works, but every label and message
masks it. The Python packages come with ``pip install 'geoexp[postgis]'``
(psycopg, SQLAlchemy, GeoAlchemy2).
"""

from geoexp.postgis._read import read_source
from geoexp.postgis._source import (
    DatabaseSource,
    connect,
    has_password,
    is_database_url,
    mask_url,
)
from geoexp.postgis._write import check_name, write_tables

__all__ = [
    "DatabaseSource",
    "check_name",
    "connect",
    "has_password",
    "is_database_url",
    "mask_url",
    "read_source",
    "write_tables",
]
