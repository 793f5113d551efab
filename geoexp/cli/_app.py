from __future__ import annotations

import sys
from pathlib import Path
from typing import Annotated

import typer
from rich.console import Console

from geoexp.errors import GeoexpError

app = typer.Typer(
    name="geoexp",
    help=(
        "Plan and analyse randomized field trials over street segments and parcels, "
        "with spillover between nearby places. geoexp supports, but does not replace, ethics "
        "review, legal advice, community consultation and the judgement of the agencies "
        "involved; local law governs."
    ),
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)
console = Console(stderr=False, highlight=False, soft_wrap=True)
errors = Console(stderr=True, highlight=False, soft_wrap=True)


def main() -> None:
    """Entry point: run the app and turn geoexp's errors into a message and exit code 2."""
    try:
        app()
    except GeoexpError as err:
        errors.print(f"[bold red]error:[/] {err}")
        sys.exit(2)


SpecArg = Annotated[Path, typer.Argument(help="Design spec (TOML).", exists=False)]
TrialOpt = Annotated[Path, typer.Option("--trial", "-t", help="Trial file (GeoPackage).")]


@app.command("draw")
def draw_command(
    spec: SpecArg,
    trial: TrialOpt,
    replace: Annotated[
        bool,
        typer.Option("--replace", help="Replace a drawn (locked) assignment; the old one is kept."),
    ] = False,
    reason: Annotated[
        str, typer.Option(help="Why a locked assignment is replaced (recorded).")
    ] = "",
    draws: Annotated[
        int | None, typer.Option(help="Monte Carlo draws (default: the spec's).")
    ] = None,
    csv: Annotated[Path | None, typer.Option(help="Also write the field list as CSV here.")] = None,
) -> None:
    """Draw a design's assignment from its spec and seed into a locked trial file."""
    from geoexp.design import Design, DesignSpec
    from geoexp.trialfile import export_assignment_csv, write_trial

    loaded = DesignSpec.from_toml(spec)
    # the number of Monte Carlo draws is part of the locked design (the analysis reuses it)
    design = Design.from_spec(loaded if draws is None else loaded.replace(draws=draws))
    assignment = design.draw()
    probs = design.probabilities()
    tf = write_trial(trial, design, assignment, probs, replace=replace, reason=reason)
    console.print(str(assignment))
    console.print(f"Trial file written and locked: {tf.path}")
    if csv is not None:
        export_assignment_csv(tf, csv)
        console.print(f"Field list: {csv}")


@app.command("check")
def check_command(
    spec: SpecArg,
    draws: Annotated[
        int | None, typer.Option(help="Monte Carlo draws (default: the spec's).")
    ] = None,
    balance: Annotated[
        list[str] | None,
        typer.Option("--balance", help="Covariate column to check balance on (repeat)."),
    ] = None,
    markdown: Annotated[
        Path | None, typer.Option(help="Also write the check as Markdown here.")
    ] = None,
) -> None:
    """Check a design before it reaches the street: conditions, probabilities, positivity, balance."""
    from geoexp.design import Design, DesignSpec, check_design

    design = Design.from_spec(DesignSpec.from_toml(spec))
    result = check_design(
        design, n_draws=draws, assignment=design.draw(), balance_columns=balance or None
    )
    console.print(str(result))
    if markdown is not None:
        markdown.write_text(result.to_markdown(), encoding="utf-8")


@app.command("export")
def export_command(
    trial: Annotated[Path, typer.Argument(help="Trial file (GeoPackage).")],
    csv: Annotated[Path, typer.Option(help="CSV file to write.")],
) -> None:
    """Write a trial's assignment as a CSV list for field teams."""
    from geoexp.trialfile import export_assignment_csv

    out = export_assignment_csv(trial, csv)
    console.print(f"{len(out)} units written to {csv}")


@app.command("sample-region")
def sample_region_command(
    out: Annotated[Path, typer.Option(help="GeoPackage to write.")] = Path("quillmere.gpkg"),
    seed: Annotated[int, typer.Option(help="Seed of the generator.")] = 20261202,
) -> None:
    """Write the invented sample city (street segments, parcels, districts, incidents)."""
    from geoexp.sampleregion import make_city, write_sample_region

    region = make_city(seed)
    write_sample_region(region, out)
    console.print(f"Sample region {region.name!r} written to {out}")


@app.command("demo")
def demo_command(
    out: Annotated[Path, typer.Option(help="Folder for the demo's outputs.")] = Path("demo_trial"),
    draws: Annotated[int, typer.Option(help="Monte Carlo draws.")] = 2000,
) -> None:
    """Run the whole job on the built-in sample region, from planning to the results report."""
    from geoexp.quickstart import run_demo

    run_demo(out, n_draws=draws, echo=console.print)


def _period(text: str, what: str) -> tuple[str, str]:
    parts = text.split(":")
    if len(parts) != 2 or not all(parts):
        raise typer.BadParameter(f"{what} must be START:END dates, e.g. 2025-01-01:2025-12-31")
    return parts[0], parts[1]


@app.command("count")
def count_command(
    trial: Annotated[Path, typer.Argument(help="Trial file (GeoPackage).")],
    incidents: Annotated[Path, typer.Option(help="Incident points: CSV or point layer.")],
    pre: Annotated[str, typer.Option(help="Pre-period START:END (dates, both included).")],
    post: Annotated[str, typer.Option(help="Post-period START:END (dates, both included).")],
    date_column: Annotated[str, typer.Option(help="Column of incident dates.")] = "date",
    date_format: Annotated[
        str | None,
        typer.Option(help="'iso', 'dmy' (day first), 'mdy' (month first) or a strftime pattern."),
    ] = None,
    type_column: Annotated[str | None, typer.Option(help="Column of incident types.")] = None,
    lon: Annotated[str | None, typer.Option(help="Longitude column (CSV in WGS 84).")] = None,
    lat: Annotated[str | None, typer.Option(help="Latitude column (CSV in WGS 84).")] = None,
    x: Annotated[str | None, typer.Option(help="x column (CSV in a projected CRS).")] = None,
    y: Annotated[str | None, typer.Option(help="y column (CSV in a projected CRS).")] = None,
    crs: Annotated[str | None, typer.Option(help="CRS of x/y columns, e.g. EPSG:32633.")] = None,
    tolerance: Annotated[float, typer.Option(help="Snapping tolerance in metres.")] = 30.0,
    dropped: Annotated[
        Path | None, typer.Option(help="CSV for the incidents not counted, with reasons.")
    ] = None,
) -> None:
    """Count incidents per unit for the pre- and post-periods and store them in the trial file."""
    from geoexp.outcomes import count_incidents, save_outcomes
    from geoexp.trialfile import TrialFile

    table = count_incidents(
        TrialFile.open(trial),
        incidents,
        date_column=date_column,
        date_format=date_format,
        type_column=type_column,
        lon=lon,
        lat=lat,
        x=x,
        y=y,
        crs=crs,
        tolerance_m=tolerance,
        pre=_period(pre, "--pre"),
        post=_period(post, "--post"),
        dropped_path=dropped,
    )
    save_outcomes(trial, table)
    console.print(str(table.drops))
    console.print(f"Outcomes stored in {trial}")


@app.command("counts")
def counts_command(
    trial: Annotated[Path, typer.Argument(help="Trial file (GeoPackage).")],
    table: Annotated[Path, typer.Option(help="CSV of counts: one row per unit.")],
    pre: Annotated[str, typer.Option(help="Pre-period START:END the counts cover.")],
    post: Annotated[str, typer.Option(help="Post-period START:END the counts cover.")],
    id_column: Annotated[str, typer.Option(help="Unit id column of the CSV.")] = "unit_id",
    pre_column: Annotated[str, typer.Option(help="Column of pre-period counts.")] = "pre",
    post_column: Annotated[str, typer.Option(help="Column of post-period counts.")] = "post",
    fill_missing: Annotated[
        bool, typer.Option(help="Units missing from the CSV had no incidents (count 0).")
    ] = False,
) -> None:
    """Store a ready table of counts per unit (pre- and post-period) in the trial file."""
    import pandas as pd

    from geoexp.errors import InputError
    from geoexp.outcomes import OutcomeTable, save_outcomes
    from geoexp.trialfile import TrialFile

    tf = TrialFile.open(trial)
    if not table.exists():
        raise InputError(f"counts file {str(table)!r} does not exist")
    # ids are read as text first, then matched to the trial's id type
    frame = pd.read_csv(table, dtype={id_column: str})
    ids = tf.units().index
    if id_column in frame.columns and ids.dtype.kind in "iu":
        frame[id_column] = pd.to_numeric(frame[id_column], errors="coerce")
    outcomes = OutcomeTable.from_counts(
        frame,
        id_column,
        units=tf,
        pre=_period(pre, "--pre"),
        post=_period(post, "--post"),
        pre_column=pre_column,
        post_column=post_column,
        fill_missing=fill_missing,
        source=str(table),
    )
    save_outcomes(tf, outcomes)
    console.print(f"Counts for {len(outcomes.counts)} units stored in {trial}")


@app.command("analyse")
def analyse_command(
    trial: Annotated[Path, typer.Argument(help="Trial file (with outcomes, or give --incidents).")],
    report: Annotated[
        Path, typer.Option(help="HTML report to write (a .md twin goes beside it).")
    ] = Path("report.html"),
    incidents: Annotated[
        Path | None, typer.Option(help="Incident points to count first (CSV or point layer).")
    ] = None,
    pre: Annotated[str | None, typer.Option(help="With --incidents: pre-period START:END.")] = None,
    post: Annotated[
        str | None, typer.Option(help="With --incidents: post-period START:END.")
    ] = None,
    date_column: Annotated[str, typer.Option(help="With --incidents: date column.")] = "date",
    date_format: Annotated[
        str | None,
        typer.Option(help="With --incidents: 'iso', 'dmy', 'mdy' or a strftime pattern."),
    ] = None,
    lon: Annotated[str | None, typer.Option(help="With --incidents: longitude column.")] = None,
    lat: Annotated[str | None, typer.Option(help="With --incidents: latitude column.")] = None,
    x: Annotated[str | None, typer.Option(help="With --incidents: x column.")] = None,
    y: Annotated[str | None, typer.Option(help="With --incidents: y column.")] = None,
    crs: Annotated[str | None, typer.Option(help="With --incidents: CRS of x/y.")] = None,
    tolerance: Annotated[float, typer.Option(help="Snapping tolerance in metres.")] = 30.0,
    outcome: Annotated[str, typer.Option(help="'change' (post minus pre) or 'post'.")] = "change",
    estimator: Annotated[str, typer.Option(help="'hajek' or 'horvitz-thompson'.")] = "hajek",
    draws: Annotated[int, typer.Option(help="Draws of the design per randomization test.")] = 2000,
    level: Annotated[float, typer.Option(help="Confidence level.")] = 0.95,
) -> None:
    """Estimate direct and spillover effects, test them, and write the report.

    With --incidents (and --pre, --post) the incidents are counted and stored
    first, so one command goes from the trial file and the incidents to the report.
    """
    from geoexp.analysis import analyse, save_results
    from geoexp.report import write_report

    if incidents is not None:
        if pre is None or post is None:
            raise typer.BadParameter("--incidents needs --pre and --post")
        count_command(
            trial,
            incidents,
            pre,
            post,
            date_column=date_column,
            lon=lon,
            lat=lat,
            x=x,
            y=y,
            crs=crs,
            tolerance=tolerance,
            type_column=None,
            dropped=None,
        )
    from geoexp.maps import save_result_map

    result = analyse(trial, outcome=outcome, estimator=estimator, n_draws=draws, level=level)
    tf = save_results(trial, result)
    map_path = save_result_map(result, tf, report.with_name(f"{report.stem}_map.html"))
    html_path, md_path = write_report(result, report, trial=tf, result_map_html=map_path)
    console.print(str(result))
    console.print(f"Report: {html_path} (Markdown: {md_path}); interactive results map: {map_path}")
    console.print(f"Results stored in {trial}")
