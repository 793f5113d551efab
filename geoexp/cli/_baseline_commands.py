"""The ``baseline`` command: count incidents onto a units layer before any trial.

It writes the layer again with a new count column, the column a design spec
ranks hot spots by (``[eligible] top_column``). No trial file and no dates
are needed.
"""

from __future__ import annotations

from enum import StrEnum
from pathlib import Path
from typing import Annotated

import typer

from geoexp._paths import check_outputs, writing
from geoexp.cli._app import AllowDroppedOpt, ToleranceOpt, _period, _types, app, console


class PlanarChoice(StrEnum):
    """Units of a layer in local planar coordinates."""

    m = "m"
    ft = "ft"
    us_ft = "us-ft"


@app.command("baseline")
def baseline_command(
    units: Annotated[Path, typer.Argument(help="Units layer (GeoPackage, GeoJSON, Shapefile).")],
    incidents: Annotated[Path, typer.Option(help="Incident points: CSV or point layer.")],
    out: Annotated[Path, typer.Option(help="Layer to write: .gpkg (the layer) or .csv.")],
    column: Annotated[str, typer.Option(help="Name of the new count column.")] = "incidents",
    id_column: Annotated[
        str | None, typer.Option(help="Unit id column (or --number-rows).")
    ] = None,
    number_rows: Annotated[
        bool,
        typer.Option(
            "--number-rows", help="No unique id column: number the units 0, 1, ... in file order."
        ),
    ] = False,
    layer: Annotated[str | None, typer.Option(help="Layer of the units file.")] = None,
    units_crs: Annotated[
        str | None, typer.Option("--units-crs", help="CRS of a units layer that has none.")
    ] = None,
    planar: Annotated[
        PlanarChoice | None,
        typer.Option(help="The units layer has no CRS and is in local planar m, ft or us-ft."),
    ] = None,
    period: Annotated[
        str | None,
        typer.Option(help="Count only incidents dated START:END (both days included)."),
    ] = None,
    date_column: Annotated[
        str, typer.Option(help="With --period: column of incident dates.")
    ] = "date",
    date_format: Annotated[
        str | None,
        typer.Option(help="'iso', 'dmy' (day first), 'mdy' (month first) or a strftime pattern."),
    ] = None,
    type_column: Annotated[str | None, typer.Option(help="Column of incident types.")] = None,
    types: Annotated[
        str | None,
        typer.Option(
            help="Count only these incident types, separated by commas (e.g. "
            "burglary,robbery); needs --type-column."
        ),
    ] = None,
    lon: Annotated[str | None, typer.Option(help="Longitude column (CSV in WGS 84).")] = None,
    lat: Annotated[str | None, typer.Option(help="Latitude column (CSV in WGS 84).")] = None,
    x: Annotated[str | None, typer.Option(help="x column of the incidents.")] = None,
    y: Annotated[str | None, typer.Option(help="y column of the incidents.")] = None,
    crs: Annotated[
        str | None,
        typer.Option(help="CRS of x/y, e.g. EPSG:32633, or 'planar' for the units' own grid."),
    ] = None,
    tolerance: ToleranceOpt = 30.0,
    allow_dropped: AllowDroppedOpt = 0.5,
) -> None:
    """Count incidents per unit (one period, or all time without dates) into a new column."""
    from geoexp.outcomes import count_onto_units, write_counted_layer
    from geoexp.units import UnitSet

    if (id_column is None) == (not number_rows):
        raise typer.BadParameter(
            "give --id-column (a column of unique ids) or --number-rows, one of them",
            param_hint="'--id-column'",
        )
    kept = _types(types, type_column)
    check_outputs({"--out": out}, {"UNITS": units, "--incidents": incidents})
    unit_set = UnitSet.from_file(
        units,
        None if number_rows else id_column,
        layer=layer,
        crs=units_crs,
        planar=None if planar is None else planar.value,
    )
    counted = count_onto_units(
        unit_set,
        incidents,
        column=column,
        tolerance_m=tolerance,
        date_column=date_column if period is not None else None,
        period=None if period is None else _period(period, "--period"),
        type_column=type_column,
        types=kept or (),
        x=x,
        y=y,
        lon=lon,
        lat=lat,
        crs=crs,
        date_format=date_format,
        max_dropped_share=allow_dropped,
    )
    with writing(out, "counted layer"):
        write_counted_layer(unit_set, counted, out, source_layer=layer)
    console.print(str(counted))
    console.print(f"Units with the count column {column!r} written to {out}")
