"""The ``field-list`` command: the treated places for patrols, as CSV and GeoJSON."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from geoexp._paths import check_outputs, writing
from geoexp.cli._app import app, console


@app.command("field-list")
def field_list_command(
    trial: Annotated[Path, typer.Argument(help="Trial file (GeoPackage) with a drawn assignment.")],
    out: Annotated[
        Path | None,
        typer.Option(
            "--out",
            "-o",
            help="CSV to write (default: beside the trial, e.g. trial_field_list.csv).",
        ),
    ] = None,
    geojson: Annotated[
        Path | None,
        typer.Option(
            help="GeoJSON of the same places, for phones (default: beside the trial, e.g. "
            "trial_field_places.geojson)."
        ),
    ] = None,
    district: Annotated[
        list[str] | None,
        typer.Option("--district", "-d", help="Only this district (repeat for several)."),
    ] = None,
) -> None:
    """Write the list of treated places for patrols, numbered as in the briefing pack.

    Only treated places are listed (never control or spillover places), with the
    pack's numbers, district, street, coordinates and a geo: link to open in a
    phone's map. The analyst's list of every eligible unit is 'geoexp export'.
    """
    from geoexp.briefing import field_list, save_field_list
    from geoexp.cautions import CAUTION

    out = out or trial.with_name(f"{trial.stem}_field_list.csv")
    geojson = geojson or trial.with_name(f"{trial.stem}_field_places.geojson")
    check_outputs({"--out": out, "--geojson": geojson}, {}, trial=trial)
    places = field_list(trial, districts=district or None)
    with writing(out, "field list"):
        save_field_list(places, csv=out)
    with writing(geojson, "field places GeoJSON"):
        save_field_list(places, geojson=geojson)
    n_districts = places["district"].nunique()
    console.print(
        f"{len(places):,} treated places in {n_districts:,} "
        f"district{'s' if n_districts != 1 else ''} (numbers as in the briefing pack)"
    )
    console.print(f"Field list: {out}")
    console.print(f"GeoJSON for phones: {geojson}")
    console.print(CAUTION)
