from __future__ import annotations

import sys
import warnings
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any

import typer
from rich.console import Console

from geoexp._paths import check_outputs, writing
from geoexp.cli._failures import ClickException, GeoexpGroup, UserError, as_click_error
from geoexp.cli._figures import check_figure_paths, save_check_pictures
from geoexp.cli._inputs import incidents_input, load_spec, read_counts_csv, spec_inputs
from geoexp.cli._options import (
    MAX_DRAWS,
    EstimatorChoice,
    OutcomeChoice,
    OverTimeChoice,
    closed_share,
    open_share,
    positive_metres,
)
from geoexp.cli._progress_bars import progress_shown
from geoexp.errors import InputError

if TYPE_CHECKING:
    from geoexp.outcomes import ObservedIncidents

# The commands in the order of the job, under the heading of their step, as `geoexp --help`
# lists them. Register a new command here (one name in its step); a command not listed is
# shown last, under "Other commands".
WORKFLOW = (
    ("Prepare the data", ("sample-region", "baseline")),
    ("Choose a design", ("sweep",)),
    ("Plan and design", ("draw",)),
    ("Check the design", ("check",)),
    ("Power of the design", ("power",)),
    ("Maps and field outputs", ("map", "briefing", "field-list", "export")),
    ("During the trial: delivery", ("presence", "monitor")),
    ("Count incidents", ("count", "load-counts", "timeline")),
    ("Analyse and report", ("analyse", "received", "write-tables")),
    ("The whole job on the sample city", ("demo",)),
)


class _WorkflowGroup(GeoexpGroup):
    workflow = WORKFLOW


app = typer.Typer(
    name="geoexp",
    cls=_WorkflowGroup,
    help=(
        "Plan and analyse randomized field trials over street segments and parcels, "
        "with spillover between nearby places. geoexp supports, but does not replace, ethics "
        "review, legal advice, community consultation and the judgement of the agencies "
        "involved; local law governs."
    ),
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    # Plain help and error text: help and messages hold square brackets ("[units]") and user
    # text that must print as written, and an error stays one plain line.
    rich_markup_mode=None,
)
# Everything printed holds user text (spec names, paths, unit ids) and geoexp's own text with
# square brackets ("[units]"): neither may be read as console markup or emoji codes.
console = Console(stderr=False, highlight=False, soft_wrap=True, markup=False, emoji=False)
errors = Console(stderr=True, highlight=False, soft_wrap=True, markup=False, emoji=False)


def _plain_warning(message, category, filename, lineno, line=None) -> str:
    # A warning to a user (a street network not split at crossings) is a sentence, not a
    # source line of geoexp.
    return f"Warning: {message}\n"


def _show_version(value: bool) -> None:
    if value:
        from geoexp import __version__

        console.print(f"geoexp {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    version: Annotated[
        bool,
        typer.Option(
            "--version",
            help="Print geoexp's version and exit.",
            callback=_show_version,
            is_eager=True,
        ),
    ] = False,
) -> None:
    pass


def renamed_option(new_value, old_value, old: str, new: str):
    """The value of an option given under its old name (with a note on stderr), else the new one."""
    if old_value is None:
        return new_value
    errors.print(f"note: {old} is now called {new}; {old} still works but will be removed.")
    return old_value


def deprecated_command(old: str, new: str, command):
    """Register ``command`` again under its old name, hidden, printing a note when used."""
    import functools

    @functools.wraps(command)
    def alias(*args, **kwargs):
        errors.print(f"note: 'geoexp {old}' is now 'geoexp {new}'; the old name will be removed.")
        return command(*args, **kwargs)

    app.command(old, hidden=True, help=f"Old name of '{new}'.")(alias)
    return command


def main() -> None:
    """Entry point: mistakes give a message and exit status 2, defects one line and status 1."""
    warnings.formatwarning = _plain_warning
    try:
        app()
    except ClickException as err:  # raised outside a command (not in standalone mode)
        err.show()
        sys.exit(err.exit_code)
    except Exception as err:  # noqa: BLE001  (last resort: a user never sees a traceback)
        failure = as_click_error(err)
        failure.show()
        sys.exit(failure.exit_code)


SpecArg = Annotated[Path, typer.Argument(help="Design spec (TOML).", exists=False)]
TrialOpt = Annotated[Path, typer.Option("--trial", "-t", help="Trial file (GeoPackage).")]
ToleranceOpt = Annotated[
    float,
    typer.Option(help="Snapping tolerance in metres (> 0).", callback=positive_metres),
]
DesignDrawsOpt = Annotated[
    int | None,
    typer.Option(
        help="Draws of the design for its exposure probabilities (default: the spec's).",
        min=1,
        max=MAX_DRAWS,
    ),
]
TestDrawsOpt = Annotated[
    int,
    typer.Option(help="Draws of the design per randomization test.", min=1, max=MAX_DRAWS),
]
# The old name of --design-draws and --test-draws: hidden, accepted with a note.
OldDrawsOpt = Annotated[
    int | None, typer.Option("--draws", hidden=True, min=1, max=MAX_DRAWS, show_default=False)
]
QuietOpt = Annotated[
    bool, typer.Option("--quiet", "-q", help="No progress bars (they show only on a terminal).")
]
TypesOpt = Annotated[
    str | None,
    typer.Option(
        help="Count only these incident types, comma-separated as written in --type-column, "
        "e.g. --types burglary,robbery (recorded with the outcomes)."
    ),
]
TypeColumnOpt = Annotated[
    str | None,
    typer.Option(
        help="Column of incident types: each type is also counted on its own and the counts "
        "per type are printed and stored."
    ),
]
AllowDroppedOpt = Annotated[
    float,
    typer.Option(
        "--allow-dropped",
        help="Largest share of incidents that may be dropped before counting stops "
        "(default 0.5); a higher value is recorded in the drop report.",
        callback=closed_share,
    ),
]


@app.command("draw")
def draw_command(
    spec: SpecArg,
    trial: TrialOpt,
    replace: Annotated[
        bool,
        typer.Option("--replace", help="Replace a drawn (locked) assignment; the old one is kept."),
    ] = False,
    reason: Annotated[
        str,
        typer.Option(help="Why a locked assignment is replaced (recorded; needed with --replace)."),
    ] = "",
    design_draws: DesignDrawsOpt = None,
    csv: Annotated[
        Path | None,
        typer.Option(
            help="Also write the analysts' assignment list (every eligible unit; not for "
            "patrols: see field-list) as CSV here."
        ),
    ] = None,
    draws: OldDrawsOpt = None,
    quiet: QuietOpt = False,
) -> None:
    """Draw a design's assignment from its spec and seed into a locked trial file."""
    from geoexp.design import Design, network_check, refuse_sparse_network
    from geoexp.trialfile import export_assignment_csv, write_trial

    if replace and not reason.strip():
        raise typer.BadParameter(
            "--replace needs --reason: say why the locked assignment is replaced (it is recorded)",
            param_hint="'--reason'",
        )
    loaded = load_spec(spec)
    check_outputs({"--trial": trial, "--csv": csv}, spec_inputs(spec, loaded))
    # the number of Monte Carlo draws is part of the locked design (the analysis reuses it)
    draws = renamed_option(design_draws, draws, "--draws", "--design-draws")
    design = Design.from_spec(loaded if draws is None else loaded.replace(draws=draws))
    network = network_check(design)
    refuse_sparse_network(design, network)
    if network is not None:
        console.print(str(network))
    assignment = design.draw()
    with progress_shown(quiet):
        probs = design.probabilities()
    with writing(trial, "trial file"):
        tf = write_trial(trial, design, assignment, probs, replace=replace, reason=reason.strip())
    console.print(str(assignment))
    console.print(f"Trial file written and locked: {tf.path}")
    if csv is not None:
        with writing(csv, "assignment list"):
            export_assignment_csv(tf, csv)
        console.print(f"Assignment list for analysts (not for patrols): {csv}")


@app.command("check")
def check_command(
    spec: SpecArg,
    design_draws: DesignDrawsOpt = None,
    balance: Annotated[
        list[str] | None,
        typer.Option("--balance", help="Covariate column to check balance on (repeat)."),
    ] = None,
    markdown: Annotated[
        Path | None, typer.Option(help="Also write the check as Markdown here.")
    ] = None,
    figures: Annotated[
        Path | None,
        typer.Option(
            help="Folder for the check's figures (P(treated), balance across draws, unit flow)."
        ),
    ] = None,
    draws: OldDrawsOpt = None,
    quiet: QuietOpt = False,
) -> None:
    """Check a design before it reaches the street: conditions, probabilities, positivity, balance."""
    from geoexp._atomic import atomic_path
    from geoexp.design import Design, check_design, unit_flow

    loaded = load_spec(spec)
    pictures = check_figure_paths(figures)
    check_outputs({"--markdown": markdown, **pictures}, spec_inputs(spec, loaded))
    draws = renamed_option(design_draws, draws, "--draws", "--design-draws")
    design = Design.from_spec(loaded)
    assignment = design.draw()
    with progress_shown(quiet):
        result = check_design(
            design, n_draws=draws, assignment=assignment, balance_columns=balance or None
        )
    console.print(str(result))
    flow = unit_flow(design, assignment)
    console.print("")
    console.print(str(flow))
    if markdown is not None:
        with writing(markdown, "Markdown check"), atomic_path(markdown) as tmp:
            tmp.write_text(result.to_markdown(), encoding="utf-8")
    if figures is not None:
        save_check_pictures(result, flow, figures)


@app.command("export")
def export_command(
    trial: Annotated[Path, typer.Argument(help="Trial file (GeoPackage).")],
    csv: Annotated[Path, typer.Option(help="CSV file to write.")],
) -> None:
    """Write the analysts' assignment list (every eligible unit, its condition) as CSV.

    Not for patrols: it names control and spillover places. Field teams get
    'geoexp field-list' (treated places only).
    """
    from geoexp.trialfile import export_assignment_csv

    check_outputs({"--csv": csv}, {}, trial=trial)
    with writing(csv, "assignment list"):
        out = export_assignment_csv(trial, csv)
    console.print(f"{len(out):,} unit{'' if len(out) == 1 else 's'} written to {csv}")


def _refuse_trial_file(path: Path, option: str) -> None:
    """Refuse to write over an existing geoexp trial file (it holds a locked assignment)."""
    if not path.is_file():
        return
    from geoexp.trialfile import TrialFile

    try:
        TrialFile.open(path)
    except Exception:  # noqa: BLE001  (not a trial file: any other file may be replaced)
        return
    raise InputError(
        f"{option} '{path}' is a geoexp trial file; geoexp does not write over a trial: "
        f"choose another file for {option}"
    )


@app.command("sample-region")
def sample_region_command(
    out: Annotated[Path, typer.Option(help="GeoPackage to write.")] = Path("quillmere.gpkg"),
    seed: Annotated[int, typer.Option(help="Seed of the generator (>= 0).", min=0)] = 20261202,
) -> None:
    """Write the invented sample city (street segments, parcels, districts, incidents)."""
    from geoexp.sampleregion import make_city, write_sample_region

    check_outputs({"--out": out}, {})
    _refuse_trial_file(out, "--out")
    region = make_city(seed)
    with writing(out, "sample region"):
        write_sample_region(region, out)
    console.print(f"Sample region {region.name!r} written to {out}")


@app.command("demo")
def demo_command(
    out: Annotated[Path, typer.Option(help="Folder for the demo's outputs.")] = Path("demo_trial"),
    design_draws: Annotated[
        int,
        typer.Option(
            help="Draws of the design for its exposure probabilities, and per randomization test.",
            min=1,
            max=MAX_DRAWS,
        ),
    ] = 2000,
    draws: OldDrawsOpt = None,
    quiet: QuietOpt = False,
) -> None:
    """Run the whole job on the built-in sample region, from planning to the results report."""
    from geoexp.quickstart import run_demo

    if out.exists() and not out.is_dir():
        raise InputError(f"--out '{out}' is a file; the demo needs a folder for its outputs")
    check_outputs({"--out": out / "design.toml"}, {})
    draws = renamed_option(design_draws, draws, "--draws", "--design-draws")
    with writing(out, "demo folder"), progress_shown(quiet):
        run_demo(out, n_draws=draws, echo=console.print)


def _types(text: str | None, type_column: str | None) -> tuple[str, ...] | None:
    """The incident types of --types, refused without --type-column or when empty."""
    if text is None:
        return None
    if type_column is None:
        raise typer.BadParameter(
            "--types needs --type-column, the column of the incidents that holds their type",
            param_hint="'--types'",
        )
    names = tuple(dict.fromkeys(t.strip() for t in text.split(",") if t.strip()))
    if not names:
        raise typer.BadParameter(
            f"must name one or more incident types separated by commas, e.g. burglary,robbery; "
            f"got {text!r}",
            param_hint="'--types'",
        )
    return names


def _period(text: str, what: str) -> tuple[str, str]:
    parts = text.split(":")
    if len(parts) != 2 or not all(p.strip() for p in parts):
        raise typer.BadParameter(
            f"must be START:END dates, e.g. 2025-01-01:2025-12-31; got {text!r}",
            param_hint=f"'{what}'",
        )
    return parts[0].strip(), parts[1].strip()


def _observed_incidents(
    source: Path | str, periods: tuple[tuple[str, str], tuple[str, str]], options: dict[str, Any]
) -> ObservedIncidents:
    """The incidents to count, read as the reading options of a command say.

    ``options`` holds the command's parameters (its ``locals()``): every command
    that counts passes on every reading option (--date-column, --date-format,
    --type-column, --types, --lon, --lat, --x, --y, --crs, --tolerance), so none
    can be lost on the way.
    """
    from geoexp.outcomes import ObservedIncidents

    type_column = options["type_column"]
    return ObservedIncidents(
        source,
        pre=periods[0],
        post=periods[1],
        date_column=options["date_column"],
        date_format=options["date_format"],
        type_column=type_column,
        by_type=type_column is not None,
        keep_types=_types(options["types"], type_column),
        lon=options["lon"],
        lat=options["lat"],
        x=options["x"],
        y=options["y"],
        crs=options["crs"],
        tolerance_m=options["tolerance"],
    )


@app.command("count")
def count_command(
    trial: Annotated[Path, typer.Argument(help="Trial file (GeoPackage).")],
    incidents: Annotated[
        str,
        typer.Option(
            help="Incident points: CSV, point layer, or postgresql://...?table=schema.name "
            "(or ?query=SELECT...)."
        ),
    ],
    pre: Annotated[str, typer.Option(help="Pre-period START:END (dates, both included).")],
    post: Annotated[str, typer.Option(help="Post-period START:END (dates, both included).")],
    date_column: Annotated[str, typer.Option(help="Column of incident dates.")] = "date",
    date_format: Annotated[
        str | None,
        typer.Option(help="'iso', 'dmy' (day first), 'mdy' (month first) or a strftime pattern."),
    ] = None,
    type_column: TypeColumnOpt = None,
    types: TypesOpt = None,
    lon: Annotated[str | None, typer.Option(help="Longitude column (CSV in WGS 84).")] = None,
    lat: Annotated[str | None, typer.Option(help="Latitude column (CSV in WGS 84).")] = None,
    x: Annotated[str | None, typer.Option(help="x column (CSV in a projected CRS).")] = None,
    y: Annotated[str | None, typer.Option(help="y column (CSV in a projected CRS).")] = None,
    crs: Annotated[
        str | None,
        typer.Option(help="CRS of x/y columns, e.g. EPSG:32633 (planar: the units' local grid)."),
    ] = None,
    tolerance: ToleranceOpt = 30.0,
    dropped: Annotated[
        Path | None, typer.Option(help="CSV for the incidents not counted, with reasons.")
    ] = None,
    allow_dropped: AllowDroppedOpt = 0.5,
) -> None:
    """Count incidents per unit for the pre- and post-periods and store them in the trial file."""
    options = dict(locals())  # first: the parameters alone
    from geoexp.workflow import count_and_store

    periods = _period(pre, "--pre"), _period(post, "--post")
    source = incidents_input(incidents)
    check_outputs({"--dropped": dropped}, {"--incidents": source}, trial=trial)
    observed = _observed_incidents(source, periods, options)
    table = count_and_store(trial, observed, dropped_path=dropped, max_dropped_share=allow_dropped)
    console.print(str(table))
    console.print(f"Outcomes stored in {trial}")


@app.command("load-counts")
def load_counts_command(
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

    from geoexp.outcomes import OutcomeTable, save_outcomes
    from geoexp.trialfile import TrialFile

    periods = _period(pre, "--pre"), _period(post, "--post")
    tf = TrialFile.open(trial)
    # ids are read as text first, then matched to the trial's id type
    frame = read_counts_csv(table, id_column)
    ids = tf.units().index
    if id_column in frame.columns and ids.dtype.kind in "iu":
        frame[id_column] = pd.to_numeric(frame[id_column], errors="coerce")
    outcomes = OutcomeTable.from_counts(
        frame,
        id_column,
        units=tf,
        pre=periods[0],
        post=periods[1],
        pre_column=pre_column,
        post_column=post_column,
        fill_missing=fill_missing,
        source=str(table),
    )
    with writing(trial, "trial file"):
        save_outcomes(tf, outcomes)
    n = len(outcomes.counts)
    console.print(f"Counts for {n:,} unit{'' if n == 1 else 's'} stored in {trial}")


deprecated_command("counts", "load-counts", load_counts_command)


@app.command("analyse")
def analyse_command(
    trial: Annotated[Path, typer.Argument(help="Trial file (with outcomes, or give --incidents).")],
    report: Annotated[
        Path, typer.Option(help="HTML report to write (a .md twin goes beside it).")
    ] = Path("report.html"),
    incidents: Annotated[
        str | None,
        typer.Option(
            help="Incident points to count first (CSV, point layer or postgresql:// URL)."
        ),
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
    type_column: TypeColumnOpt = None,
    types: TypesOpt = None,
    lon: Annotated[str | None, typer.Option(help="With --incidents: longitude column.")] = None,
    lat: Annotated[str | None, typer.Option(help="With --incidents: latitude column.")] = None,
    x: Annotated[str | None, typer.Option(help="With --incidents: x column.")] = None,
    y: Annotated[str | None, typer.Option(help="With --incidents: y column.")] = None,
    crs: Annotated[str | None, typer.Option(help="With --incidents: CRS of x/y.")] = None,
    tolerance: ToleranceOpt = 30.0,
    allow_dropped: AllowDroppedOpt = 0.5,
    outcome: Annotated[
        OutcomeChoice, typer.Option(help="'change' (post minus pre) or 'post'.")
    ] = OutcomeChoice.change,
    estimator: Annotated[
        EstimatorChoice, typer.Option(help="'hajek' or 'horvitz-thompson'.")
    ] = EstimatorChoice.hajek,
    test_draws: TestDrawsOpt = 2000,
    level: Annotated[
        float, typer.Option(help="Confidence level, between 0 and 1.", callback=open_share)
    ] = 0.95,
    over_time: Annotated[
        OverTimeChoice, typer.Option(help="With --incidents: periods of the section 'Over time'.")
    ] = OverTimeChoice.month,
    draws: OldDrawsOpt = None,
    quiet: QuietOpt = False,
) -> None:
    """Estimate direct and spillover effects, test them, and write the report.

    With --incidents (and --pre, --post) the incidents are counted and stored
    first, so one command goes from the trial file and the incidents to the report.
    """
    options = dict(locals())  # first: the parameters alone
    from geoexp.workflow import analyse_trial, count_and_store, report_outputs

    draws = renamed_option(test_draws, draws, "--draws", "--test-draws")
    outs = report_outputs(report)
    source = incidents_input(incidents)
    check_outputs(
        {
            "--report": outs["report"],
            "--report (its Markdown twin)": outs["report_md"],
            "--report (its PDF twin)": outs["report_pdf"],
            "--report (its results map)": outs["result_map"],
        },
        {"--incidents": source},
        trial=trial,
    )
    observed: ObservedIncidents | None = None  # dated incidents: the report's "Over time"
    if source is not None:
        if pre is None or post is None:
            raise typer.BadParameter(
                "--incidents needs --pre and --post", param_hint="'--incidents'"
            )
        periods = _period(pre, "--pre"), _period(post, "--post")
        observed = _observed_incidents(source, periods, options)
        table = count_and_store(trial, observed, max_dropped_share=allow_dropped)
        console.print(str(table))
    elif types is not None or type_column is not None:
        raise typer.BadParameter(
            "--type-column and --types apply when counting: give them with --incidents "
            "(or with 'geoexp count')",
            param_hint="'--types'" if types is not None else "'--type-column'",
        )
    with progress_shown(quiet):
        run = analyse_trial(
            trial,
            report=outs["report"],
            result_map=outs["result_map"],
            outcome=outcome.value,
            estimator=estimator.value,
            n_draws=draws,
            level=level,
            incidents=observed,
            period=over_time.value,
        )
    console.print(str(run))


__all__ = ["UserError", "app", "console", "errors", "main"]
