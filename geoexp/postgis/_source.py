"""A PostGIS table or query named by a ``postgresql://`` URL, and the connection to it.

A source is written as a libpq connection URL with, at most, three
parameters of geoexp's own that are taken off before connecting:

``table``
    a table or view, ``name`` or ``schema.name``;
``query``
    a SQL ``SELECT`` (percent-encoded inside a URL; in the library and the
    spec it can be given as plain text);
``geometry``
    the geometry column to use when the table has more than one.

Everything else in the URL (host, port, database, user, ``sslmode``,
``service``, ``host=/path/to/socket`` ...) goes to libpq unchanged, so a
password is best left to libpq's own places: ``PGPASSWORD``, ``~/.pgpass`` or
a service file (``PGSERVICE``, ``?service=``). A password written in a URL
works but is never shown: every label and message masks it.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import TypeGuard
from urllib.parse import parse_qsl, quote, urlencode, urlsplit

from geoexp._optional import import_optional
from geoexp.errors import InputError

SCHEMES = ("postgresql", "postgres")
OWN_PARAMETERS = ("table", "query", "geometry")
_MASK = "***"
_IDENTIFIER = r'(?:[A-Za-z_][A-Za-z0-9_$]*|"(?:[^"]|"")+")'
_TABLE_NAME = re.compile(rf"^\s*{_IDENTIFIER}(?:\s*\.\s*{_IDENTIFIER})?\s*$")


def is_database_url(value: object) -> TypeGuard[str]:
    """True when ``value`` is text starting with ``postgresql://`` or ``postgres://``.

    Parameters
    ----------
    value : object
        Anything given as a source; only text can be a URL.

    Returns
    -------
    bool
        Whether ``value`` is a PostgreSQL URL (the scheme in any case).
    """
    if not isinstance(value, str):
        return False
    head = value.strip().split(":", 1)[0].lower()
    return head in SCHEMES and value.strip()[len(head) :].startswith("://")


def mask_url(url: str) -> str:
    """The URL with any password (in the user part or as ``password=``) replaced by ``***``.

    Parameters
    ----------
    url : str
        A database URL.

    Returns
    -------
    str
        The URL safe to print in messages and logs.
    """
    parts = urlsplit(url)
    netloc = parts.netloc
    if "@" in netloc:
        user, host = netloc.rsplit("@", 1)
        if ":" in user:
            user = user.split(":", 1)[0] + ":" + _MASK
        netloc = f"{user}@{host}"
    pairs = parse_qsl(parts.query, keep_blank_values=True)
    if any(k.lower() == "password" for k, _ in pairs):
        pairs = [(k, _MASK if k.lower() == "password" else v) for k, v in pairs]
        query = urlencode(pairs, safe="*/")
    else:
        query = parts.query
    return _join(parts.scheme, netloc, parts.path, query)


def _join(scheme: str, netloc: str, path: str, query: str) -> str:
    # urlunsplit would drop the "//" of an empty host ("postgresql:///city"), which libpq needs.
    return f"{scheme}://{netloc}{path}" + (f"?{query}" if query else "")


def has_password(url: str) -> bool:
    """True when the URL itself carries a password.

    Parameters
    ----------
    url : str
        A database URL.

    Returns
    -------
    bool
        True for a password in the user part or a ``password=`` parameter.
    """
    parts = urlsplit(url)
    if parts.password:
        return True
    return any(k.lower() == "password" for k, _ in parse_qsl(parts.query))


@dataclass(frozen=True)
class DatabaseSource:
    """A PostGIS table or query: where units or incidents are read from.

    Build one with :meth:`parse` from a single URL (``?table=`` or
    ``?query=`` in it), or directly with ``DatabaseSource(url, table=...)``.

    Attributes
    ----------
    url : str
        libpq connection URL without geoexp's own parameters.
    table : str, optional
        ``name`` or ``schema.name`` of a table or view.
    query : str, optional
        A SQL ``SELECT``; give exactly one of ``table`` and ``query``.
    geometry : str, optional
        Geometry column to use when there are several.
    """

    url: str
    table: str | None = None
    query: str | None = None
    geometry: str | None = None

    def __post_init__(self) -> None:
        if not is_database_url(self.url):
            raise InputError(
                f"a database source must be a postgresql:// URL, got {mask_url(str(self.url))!r}"
            )
        if (self.table is None) == (self.query is None):
            raise InputError(
                f"the database source {self.label} needs exactly one of a table "
                "(?table=schema.name) and a query (?query=SELECT ...)"
            )
        if self.table is not None and not _TABLE_NAME.match(self.table):
            raise InputError(
                f"table {self.table!r} of the database source {mask_url(self.url)} is not a table "
                "name: write name or schema.name (double quotes around names with other "
                "characters)"
            )
        if self.query is not None and not self.query.strip().rstrip(";").strip():
            raise InputError(f"the query of the database source {mask_url(self.url)} is empty")

    @classmethod
    def parse(
        cls,
        text: str,
        *,
        table: str | None = None,
        query: str | None = None,
        geometry: str | None = None,
    ) -> DatabaseSource:
        """Read a source from a URL; ``table=``/``query=``/``geometry=`` add to its parameters.

        Parameters
        ----------
        text : str
            ``postgresql://[user@][host][:port][/database][?table=...|query=...]``.
        table, query, geometry : str, optional
            The same as the URL parameters; giving one in both places is an error.

        Returns
        -------
        DatabaseSource
        """
        if not is_database_url(text):
            raise InputError(f"{mask_url(str(text))!r} is not a postgresql:// URL")
        parts = urlsplit(text.strip())
        own: dict[str, str] = {}
        rest: list[tuple[str, str]] = []
        for key, value in parse_qsl(parts.query, keep_blank_values=True):
            if key in OWN_PARAMETERS:
                if key in own:
                    raise InputError(f"the database URL {mask_url(text)} gives {key}= twice")
                own[key] = value
            else:
                rest.append((key, value))
        given = {"table": table, "query": query, "geometry": geometry}
        for key, given_value in given.items():
            if given_value is not None:
                if key in own:
                    raise InputError(
                        f"the database URL {mask_url(text)} already gives {key}=; give it once"
                    )
                own[key] = given_value
        url = _join(parts.scheme, parts.netloc, parts.path, urlencode(rest, quote_via=quote))
        return cls(url, own.get("table"), own.get("query"), own.get("geometry"))

    @property
    def label(self) -> str:
        """How messages and records name the source: the URL with the password masked."""
        what = f"table {self.table}" if self.table is not None else "a query"
        return f"{mask_url(self.url)} ({what})"

    def select_sql(self) -> str:
        """The SQL that reads the source's rows."""
        if self.table is not None:
            return f"SELECT * FROM {self.table.strip()}"
        assert self.query is not None  # exactly one of table and query (checked on creation)
        return self.query.strip().rstrip(";")

    def connect(self):
        """A SQLAlchemy engine over psycopg for this source's database (libpq reads the URL)."""
        return connect(self.url)


def connect(url: str):
    """A SQLAlchemy engine whose connections libpq opens from ``url`` exactly as given.

    The URL goes to libpq as it is, so libpq's environment variables, password
    file and service file work as they do for ``psql``.

    Parameters
    ----------
    url : str
        A ``postgresql://`` URL naming the database only (no table or layer
        parameters).

    Returns
    -------
    sqlalchemy.engine.Engine
        Engine using psycopg.

    Raises
    ------
    geoexp.errors.InputError
        Not a ``postgresql://`` URL, or it carries ``table=``, ``query=`` or
        ``geometry=`` (the URL names only the database here).
    """
    sqlalchemy = import_optional("sqlalchemy", "postgis", "Reading from or writing to PostGIS")
    psycopg = import_optional("psycopg", "postgis", "Reading from or writing to PostGIS")
    import_optional("geoalchemy2", "postgis", "Reading from or writing to PostGIS")
    if not is_database_url(url):
        raise InputError(f"{mask_url(str(url))!r} is not a postgresql:// URL")
    own = [k for k, _ in parse_qsl(urlsplit(url).query) if k in OWN_PARAMETERS]
    if own:
        raise InputError(
            f"the database URL {mask_url(url)} names {', '.join(own)}=; here only the database "
            "is wanted"
        )

    del psycopg  # imported above only to name the extra when it is missing
    return sqlalchemy.create_engine("postgresql+psycopg://", creator=lambda: open_connection(url))


def open_connection(url: str):
    """A psycopg connection opened by libpq from ``url`` as given; failures are InputErrors."""
    psycopg = import_optional("psycopg", "postgis", "Reading from or writing to PostGIS")
    try:
        return psycopg.connect(url)
    except psycopg.Error as err:
        raise InputError(
            f"could not connect to the database {mask_url(url)}: {safe_message(err, url)}. "
            "The password, if one is needed, is read from PGPASSWORD, ~/.pgpass or a "
            "service file (PGSERVICE)"
        ) from None


def safe_message(err: BaseException, url: str) -> str:
    """The first line of a driver's message, with the URL's password (if any) masked."""
    text = str(getattr(err, "orig", None) or err).strip().splitlines()
    line = text[0] if text else type(err).__name__
    password = urlsplit(url).password
    if password:
        line = line.replace(password, _MASK)
    for key, value in parse_qsl(urlsplit(url).query):
        if key.lower() == "password" and value:
            line = line.replace(value, _MASK)
    return line
