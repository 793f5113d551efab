"""The ``briefing`` command: a trial file in, a printable PDF briefing pack out."""

from __future__ import annotations

from enum import StrEnum
from pathlib import Path
from typing import Annotated

import typer

from geoexp._paths import check_outputs, writing
from geoexp.cli._app import app, console


class PaperChoice(StrEnum):
    """Paper sizes the pack is laid out for."""

    a4 = "a4"
    letter = "letter"


@app.command("briefing")
def briefing_command(
    trial: Annotated[Path, typer.Argument(help="Trial file (GeoPackage) with a drawn assignment.")],
    out: Annotated[
        Path | None,
        typer.Option(
            "--out",
            "-o",
            help="PDF to write (default: beside the trial, e.g. trial_briefing_a4.pdf).",
        ),
    ] = None,
    paper: Annotated[
        PaperChoice, typer.Option(help="Paper size, portrait: a4 or letter.")
    ] = PaperChoice.a4,
    district: Annotated[
        list[str] | None,
        typer.Option("--district", "-d", help="Only this district (repeat for several)."),
    ] = None,
    districts: Annotated[
        Path | None,
        typer.Option(
            help="District polygons (any vector file with a CRS), drawn as they are; by "
            "default approximate outlines around each district's units."
        ),
    ] = None,
) -> None:
    """Write the printable briefing pack for field teams: cover, overview, district maps, lists and visit logs."""
    from geoexp.briefing import briefing_pack, plan_briefing
    from geoexp.cautions import CAUTION

    if out is None:
        out = trial.with_name(f"{trial.stem}_briefing_{paper.value}.pdf")
    check_outputs({"--out": out}, {"--districts": districts}, trial=trial)
    plan = plan_briefing(trial, paper=paper.value, districts=district or None)
    with writing(out, "briefing pack"):
        path = briefing_pack(
            trial,
            out,
            paper=paper.value,
            districts=district or None,
            district_polygons=districts,
        )
    console.print(str(plan))
    console.print(f"Briefing pack written: {path}")
    console.print(CAUTION)
