"""The ``write-tables`` command: a trial's tables copied to a PostGIS database."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from geoexp.cli._app import app, console


@app.command("write-tables")
def write_tables_command(
    trial: Annotated[Path, typer.Argument(help="Trial file (GeoPackage).")],
    to: Annotated[
        str,
        typer.Option(
            "--to",
            help="Database URL, postgresql://[user@][host][:port]/database; the password "
            "comes from PGPASSWORD, ~/.pgpass or a service file.",
        ),
    ],
    schema: Annotated[
        str, typer.Option(help="Schema to write into (created if missing).")
    ] = "geoexp",
    prefix: Annotated[
        str, typer.Option(help="Put before each table name, e.g. patrols_2026_.")
    ] = "",
    replace: Annotated[
        bool, typer.Option("--replace", help="Replace tables of the same names.")
    ] = False,
) -> None:
    """Copy a trial's assignment, probabilities, outcomes and results into database tables.

    The trial file stays the record; the tables (trial, assignment, outcomes,
    results) are for an agency's own dashboards and plain SQL.
    """
    from geoexp.postgis import mask_url
    from geoexp.publish import write_trial_tables

    written = write_trial_tables(trial, to, schema=schema, prefix=prefix, replace=replace)
    console.print(f"Tables written to {mask_url(to)}: {', '.join(written)}")
