"""The ``map`` command: the interactive planning map, or a draw-only map before a design."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from geoexp._paths import check_outputs, writing
from geoexp.cli._app import app, console
from geoexp.cli._inputs import load_spec, spec_inputs


def _tiles(value: str) -> str | None:
    return None if value.lower() in ("none", "plain") else value


def _draw_only_map(spec, districts: Path | None, tiles: str | None):
    """Units of a spec with their eligibility so far, before any design is drawn."""
    from geoexp.design import eligible_for, units_for
    from geoexp.maps import drawing_map

    units = units_for(spec)
    eligible = eligible_for(spec, units)
    return drawing_map(
        units,
        eligible=eligible.ids,
        districts=districts,
        district_column=spec.field.district_column,
        description_column=spec.field.description_column,
        zones=[spec.resolve(z) for z in spec.eligible.exclude],
        title=f"{spec.name}: exclusion zones",
        tiles=tiles,
    )


@app.command("map")
def map_command(
    source: Annotated[
        Path,
        typer.Argument(help="Trial file (GeoPackage); with --draw-only, a design spec (TOML)."),
    ],
    out: Annotated[Path, typer.Option("--out", "-o", help="HTML file to write.")] = Path(
        "planning_map.html"
    ),
    draw_only: Annotated[
        bool,
        typer.Option(
            "--draw-only",
            help="Map a spec's eligible units with only the drawing tool, before a design exists.",
        ),
    ] = False,
    districts: Annotated[
        Path | None, typer.Option(help="District polygons (any vector file with a CRS).")
    ] = None,
    tiles: Annotated[
        str,
        typer.Option(
            help="Base map: 'auto' (OpenStreetMap; none for the sample city), 'none', or a "
            "tile name or URL template."
        ),
    ] = "auto",
) -> None:
    """Make the interactive planning map: one HTML page that works offline (apart from tiles)."""
    from geoexp.maps import planning_map, save_map

    if draw_only:
        spec = load_spec(source)
        check_outputs({"--out": out}, {**spec_inputs(source, spec), "--districts": districts})
        m = _draw_only_map(spec, districts, _tiles(tiles))
    else:
        check_outputs({"--out": out}, {"--districts": districts}, trial=source)
        m = planning_map(source, districts=districts, tiles=_tiles(tiles))
    with writing(out, "map"):
        path = save_map(m, out)
    size_kb = path.stat().st_size / 1024
    console.print(f"Map written: {path} ({size_kb:,.0f} KB)")
    console.print(
        "Draw exclusion zones with the polygon or rectangle tool, press 'Save zones', and list "
        "the file under [eligible] exclude in the design spec.",
        markup=False,
    )
