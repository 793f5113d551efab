"""The ``presence`` and ``monitor`` commands: was the treatment delivered?"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Literal, cast

import typer

from geoexp._paths import check_outputs, writing
from geoexp.cli._app import app, console
from geoexp.cli._options import positive_metres
from geoexp.errors import InputError

TrialArg = Annotated[Path, typer.Argument(help="Trial file (GeoPackage).")]
PingsOpt = Annotated[
    Path | None, typer.Option(help="GPS pings: CSV or Parquet (device, time, position).")
]
VisitsOpt = Annotated[
    Path | None, typer.Option(help="Visit log: CSV or point layer (place, start, end).")
]
DeviceOpt = Annotated[str, typer.Option(help="Pings: column of the device id.")]
TimeOpt = Annotated[str, typer.Option(help="Pings: column of the time (ISO 8601, local clock).")]
UnitColOpt = Annotated[
    str | None, typer.Option(help="Visit log: column of unit ids (else positions).")
]
StartOpt = Annotated[str, typer.Option(help="Visit log: column of the visit's start.")]
EndOpt = Annotated[str, typer.Option(help="Visit log: column of the visit's end.")]
TeamOpt = Annotated[str | None, typer.Option(help="Visit log: column of the team or officer.")]
ActivityOpt = Annotated[str | None, typer.Option(help="Visit log: column of the activity type.")]
LonOpt = Annotated[str | None, typer.Option(help="Longitude column (WGS 84).")]
LatOpt = Annotated[str | None, typer.Option(help="Latitude column (WGS 84).")]
XOpt = Annotated[str | None, typer.Option(help="x column (in --crs).")]
YOpt = Annotated[str | None, typer.Option(help="y column (in --crs).")]
CrsOpt = Annotated[str | None, typer.Option(help="CRS of x/y columns, e.g. EPSG:32633.")]
TolOpt = Annotated[
    float,
    typer.Option(help="Snapping tolerance in metres (> 0).", callback=positive_metres),
]
GapOpt = Annotated[float, typer.Option(help="Pings: longest gap in seconds within a stay.", min=0)]
SpeedOpt = Annotated[
    float, typer.Option(help="Pings: highest speed in km/h that still counts as present.", min=0)
]
MinStayOpt = Annotated[
    float, typer.Option(help="Pings: shortest stay in minutes that counts as a visit.", min=0)
]


def load_stays(
    trial,
    pings,
    visits,
    *,
    device,
    time,
    unit_column,
    start,
    end,
    team,
    activity,
    lon,
    lat,
    x,
    y,
    crs,
    tolerance,
    max_gap,
    max_speed,
    min_stay,
):
    """Stays from pings or a visit log, snapped to the trial's units."""
    from geoexp.delivery import read_visits, stays_from_pings
    from geoexp.trialfile import TrialFile
    from geoexp.units import UnitSet

    if (pings is None) == (visits is None):
        raise InputError("give either --pings or --visits")
    tf = TrialFile.open(trial)
    units = UnitSet.from_frame(tf.units(), None, source=str(trial))
    if pings is not None:
        stays = stays_from_pings(
            pings,
            units,
            device=device,
            time=time,
            x=x,
            y=y,
            lon=lon,
            lat=lat,
            crs=crs,
            tolerance_m=tolerance,
            max_gap_s=max_gap,
            max_speed_kmh=max_speed,
            min_minutes=min_stay,
        )
    else:
        stays = read_visits(
            visits,
            units,
            start=start,
            end=end,
            unit_column=unit_column,
            x=x,
            y=y,
            lon=lon,
            lat=lat,
            crs=crs,
            team_column=team,
            activity_column=activity,
            tolerance_m=tolerance,
        )
    return tf, stays


@app.command("presence")
def presence_command(
    trial: TrialArg,
    out: Annotated[
        Path, typer.Option(help="CSV of minutes present and visits per unit and period.")
    ],
    pings: PingsOpt = None,
    visits: VisitsOpt = None,
    freq: Annotated[
        str, typer.Option(help="'day', 'week' (ISO, from Monday) or 'period'.")
    ] = "week",
    first_day: Annotated[str | None, typer.Option(help="First day counted (ISO date).")] = None,
    last_day: Annotated[str | None, typer.Option(help="Last day counted (ISO date).")] = None,
    device: DeviceOpt = "device",
    time: TimeOpt = "time",
    unit_column: UnitColOpt = None,
    start: StartOpt = "start",
    end: EndOpt = "end",
    team: TeamOpt = None,
    activity: ActivityOpt = None,
    lon: LonOpt = None,
    lat: LatOpt = None,
    x: XOpt = None,
    y: YOpt = None,
    crs: CrsOpt = None,
    tolerance: TolOpt = 25.0,
    max_gap: GapOpt = 300.0,
    max_speed: SpeedOpt = 8.0,
    min_stay: MinStayOpt = 2.0,
) -> None:
    """Minutes present and visits per unit and period, from GPS pings or a visit log."""
    if freq not in ("day", "week", "period"):
        raise typer.BadParameter(
            f"must be day, week or period; got {freq!r}", param_hint="'--freq'"
        )
    inputs = {"--pings": pings, "--visits": visits}
    check_outputs({"--out": out}, {k: v for k, v in inputs.items() if v}, trial=trial)
    _, stays = load_stays(
        trial,
        pings,
        visits,
        device=device,
        time=time,
        unit_column=unit_column,
        start=start,
        end=end,
        team=team,
        activity=activity,
        lon=lon,
        lat=lat,
        x=x,
        y=y,
        crs=crs,
        tolerance=tolerance,
        max_gap=max_gap,
        max_speed=max_speed,
        min_stay=min_stay,
    )
    dosage = stays.dosage(freq, start=first_day, end=last_day)
    table = dosage.frame.rename(columns={"unit": stays.unit_ids.name or "unit"})
    with writing(out, "presence table"):
        from geoexp._atomic import atomic_path

        with atomic_path(out) as tmp:
            table.to_csv(tmp, index=False, encoding="utf-8")
    console.print(str(stays), markup=False)
    console.print(
        f"{len(table):,} unit-{freq}s with presence (minutes present, visits) written to {out}"
    )


@app.command("monitor")
def monitor_command(
    trial: TrialArg,
    planned_minutes: Annotated[
        float, typer.Option(help="Planned minutes of presence per treated place per week.", min=0)
    ],
    week: Annotated[str, typer.Option(help="Any day of the week to report (ISO date).")],
    pings: PingsOpt = None,
    visits: VisitsOpt = None,
    chart: Annotated[Path | None, typer.Option(help="PNG of the weekly chart.")] = None,
    lists: Annotated[
        Path | None,
        typer.Option(help="CSV listing under-served treated places and visited control places."),
    ] = None,
    record: Annotated[
        bool, typer.Option(help="Append the week's rows to the trial file (layer delivery_weekly).")
    ] = True,
    map_png: Annotated[
        Path | None,
        typer.Option(
            "--map", help="PNG: map of the under-served treated places and visited control places."
        ),
    ] = None,
    device: DeviceOpt = "device",
    time: TimeOpt = "time",
    unit_column: UnitColOpt = None,
    start: StartOpt = "start",
    end: EndOpt = "end",
    team: TeamOpt = None,
    activity: ActivityOpt = None,
    lon: LonOpt = None,
    lat: LatOpt = None,
    x: XOpt = None,
    y: YOpt = None,
    crs: CrsOpt = None,
    tolerance: TolOpt = 25.0,
    max_gap: GapOpt = 300.0,
    max_speed: SpeedOpt = 8.0,
    min_stay: MinStayOpt = 2.0,
) -> None:
    """Weekly delivery monitor: dose per exposure condition, under-served and contaminated places.

    Appends the week's summary to the trial file as a dated record (never
    touching the assignment) unless --no-record.
    """
    import pandas as pd

    from geoexp._atomic import atomic_path
    from geoexp.delivery import RECORD_LAYER, delivery_week, plot_weekly_delivery, weekly_delivery
    from geoexp.trialfile import append_record

    if planned_minutes <= 0:
        raise typer.BadParameter("must be > 0", param_hint="'--planned-minutes'")
    inputs = {"--pings": pings, "--visits": visits}
    check_outputs(
        {"--chart": chart, "--lists": lists, "--map": map_png},
        {k: v for k, v in inputs.items() if v},
        trial=trial,
    )
    tf, stays = load_stays(
        trial,
        pings,
        visits,
        device=device,
        time=time,
        unit_column=unit_column,
        start=start,
        end=end,
        team=team,
        activity=activity,
        lon=lon,
        lat=lat,
        x=x,
        y=y,
        crs=crs,
        tolerance=tolerance,
        max_gap=max_gap,
        max_speed=max_speed,
        min_stay=min_stay,
    )
    assignment = tf.assignment()
    weekly = stays.dosage("week")
    summary = delivery_week(assignment, weekly, week, planned_minutes=planned_minutes)
    console.print(str(summary), markup=False)
    if lists is not None:
        under = summary.under_served.assign(condition="treated", issue="under-served")
        visited = summary.visited_controls.assign(issue="control visited", shortfall_minutes=0.0)
        table = pd.concat([under, visited])
        table.index.name = assignment.index.name
        with writing(lists, "delivery lists"), atomic_path(lists) as tmp:
            table.to_csv(tmp, encoding="utf-8")
        console.print(f"Lists written to {lists}")
    if chart is not None:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt

        ax = plot_weekly_delivery(
            weekly_delivery(assignment, weekly, planned_minutes=planned_minutes), planned_minutes
        )
        with writing(chart, "chart"), atomic_path(chart) as tmp:
            ax.figure.savefig(tmp, format="png", dpi=120, bbox_inches="tight")
        plt.close(ax.figure)
        console.print(f"Chart written to {chart}")
    if map_png is not None:
        _monitor_map(tf, summary, map_png)
    if record:
        append_record(trial, RECORD_LAYER, summary.record())
        console.print(f"Week of {summary.week} recorded in {trial} (layer {RECORD_LAYER})")


def _monitor_map(tf, summary, path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.figure import Figure

    from geoexp._atomic import atomic_path
    from geoexp.maps import delivery_map_static

    units = tf.units()
    column = tf.spec().field.district_column
    ax = delivery_map_static(
        units, summary, district_column=column if column in units.columns else None
    )
    figure = cast(Figure, ax.figure)  # the map's own figure, never a subfigure
    with writing(path, "map"), atomic_path(path) as tmp:
        figure.savefig(tmp, format="png", dpi=150, bbox_inches="tight")
    plt.close(figure)
    console.print(f"Map written to {path}")


@app.command("received")
def received_command(
    trial: TrialArg,
    pings: PingsOpt = None,
    visits: VisitsOpt = None,
    planned_minutes: Annotated[
        float | None,
        typer.Option(
            help="Planned minutes per treated place per week: the dose becomes 'at the planned "
            "dose' (0/1); without it the dose is minutes present.",
            min=0,
        ),
    ] = None,
    outcome: Annotated[str, typer.Option(help="'change' (post minus pre) or 'post'.")] = "change",
    draws: Annotated[int, typer.Option(help="Randomization draws.", min=1, max=1_000_000)] = 2000,
    level: Annotated[float, typer.Option(help="Confidence level of the interval.")] = 0.95,
    section: Annotated[
        Path | None, typer.Option(help="Markdown file for the report's added section.")
    ] = None,
    dose_chart: Annotated[
        Path | None,
        typer.Option(help="PNG: outcome by minutes present per place (descriptive, not causal)."),
    ] = None,
    device: DeviceOpt = "device",
    time: TimeOpt = "time",
    unit_column: UnitColOpt = None,
    start: StartOpt = "start",
    end: EndOpt = "end",
    team: TeamOpt = None,
    activity: ActivityOpt = None,
    lon: LonOpt = None,
    lat: LatOpt = None,
    x: XOpt = None,
    y: YOpt = None,
    crs: CrsOpt = None,
    tolerance: TolOpt = 25.0,
    max_gap: GapOpt = 300.0,
    max_speed: SpeedOpt = 8.0,
    min_stay: MinStayOpt = 2.0,
) -> None:
    """Effect of treatment received (complier effect) beside the intention-to-treat result.

    Needs stored outcomes (geoexp count). The dose is presence during the post-period.
    """
    from geoexp._atomic import atomic_path
    from geoexp.delivery import treatment_received

    if outcome not in ("change", "post"):
        raise typer.BadParameter(
            f"must be change or post; got {outcome!r}", param_hint="'--outcome'"
        )
    measure = cast(Literal["change", "post"], outcome)  # checked just above
    if not 0 < level < 1:
        raise typer.BadParameter("must be between 0 and 1", param_hint="'--level'")
    inputs = {"--pings": pings, "--visits": visits}
    check_outputs(
        {"--section": section, "--dose-chart": dose_chart},
        {k: v for k, v in inputs.items() if v},
        trial=trial,
    )
    tf, stays = load_stays(
        trial,
        pings,
        visits,
        device=device,
        time=time,
        unit_column=unit_column,
        start=start,
        end=end,
        team=team,
        activity=activity,
        lon=lon,
        lat=lat,
        x=x,
        y=y,
        crs=crs,
        tolerance=tolerance,
        max_gap=max_gap,
        max_speed=max_speed,
        min_stay=min_stay,
    )
    result = treatment_received(
        tf, stays, planned_minutes=planned_minutes, outcome=measure, n_draws=draws, level=level
    )
    console.print(str(result), markup=False)
    if section is not None:
        with writing(section, "report section"), atomic_path(section) as tmp:
            tmp.write_text(result.to_markdown(), encoding="utf-8")
        console.print(f"Section written to {section}")
    if dose_chart is not None:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt

        from geoexp.delivery import dose_response_table, plot_dose_response, received_inputs

        _, assignment, y_unit, minutes, _ = received_inputs(tf, stays, measure)
        table = dose_response_table(minutes, y_unit, assignment.to_frame()["condition"].to_numpy())
        ax = plot_dose_response(table)
        with writing(dose_chart, "chart"), atomic_path(dose_chart) as tmp:
            ax.figure.savefig(tmp, format="png", dpi=120, bbox_inches="tight")
        plt.close(ax.figure)
        console.print(f"Dose-response chart (descriptive, not causal) written to {dose_chart}")


def _window(text: str) -> tuple[str, str]:
    parts = [p.strip() for p in text.split(":")]
    if len(parts) != 2 or not all(parts):
        raise typer.BadParameter(
            f"must be START:END dates, e.g. 2026-01-01:2026-06-30; got {text!r}",
            param_hint="'--window'",
        )
    return parts[0], parts[1]


@app.command("timeline")
def timeline_command(
    trial: TrialArg,
    incidents: Annotated[Path, typer.Option(help="Incident points: CSV with a date column.")],
    window: Annotated[str, typer.Option(help="Trial window START:END (ISO dates).")],
    chart: Annotated[Path, typer.Option(help="PNG: incidents per unit by condition over time.")],
    out: Annotated[
        Path | None, typer.Option(help="CSV of mean incidents per unit by condition and period.")
    ] = None,
    freq: Annotated[str, typer.Option(help="'week' (ISO, from Monday) or 'month'.")] = "week",
    date_column: Annotated[str, typer.Option(help="Column of incident dates (ISO).")] = "date",
    lon: LonOpt = None,
    lat: LatOpt = None,
    x: XOpt = None,
    y: YOpt = None,
    crs: CrsOpt = None,
    tolerance: TolOpt = 30.0,
    effects: Annotated[
        Path | None,
        typer.Option(
            help="PNG: the effect in each post period with its interval (also printed; "
            "Holm-adjusted p-values beside the unadjusted ones)."
        ),
    ] = None,
    effects_out: Annotated[
        Path | None, typer.Option(help="CSV of the effects per post period.")
    ] = None,
    draws: Annotated[
        int, typer.Option(help="Randomization draws per period's test.", min=1, max=1_000_000)
    ] = 2000,
) -> None:
    """Incidents per unit by exposure condition over time, the trial window shaded; pre-trend.

    With --effects or --effects-out, also the treated (and band-1) effect in each post period,
    each with its own randomization test and interval; the pooled effect stays the primary result.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from geoexp._atomic import atomic_path
    from geoexp.delivery import condition_series, incidents_by_period, plot_over_time, pre_trend
    from geoexp.trialfile import TrialFile
    from geoexp.units import UnitSet

    if freq not in ("week", "month"):
        raise typer.BadParameter(f"must be week or month; got {freq!r}", param_hint="'--freq'")
    period = cast(Literal["week", "month"], freq)  # checked just above
    first, last = _window(window)
    check_outputs(
        {"--chart": chart, "--out": out, "--effects": effects, "--effects-out": effects_out},
        {"--incidents": incidents},
        trial=trial,
    )
    tf = TrialFile.open(trial)
    units = UnitSet.from_frame(tf.units(), None, source=str(trial))
    counts = incidents_by_period(
        units,
        incidents,
        date_column=date_column,
        x=x,
        y=y,
        lon=lon,
        lat=lat,
        crs=crs,
        freq=period,
        tolerance_m=tolerance,
    )
    series = condition_series(counts, tf.assignment())
    console.print(
        f"{int(counts['incidents'].sum()):,} incidents counted per unit and {freq} "
        f"({counts.attrs['dropped']:,} with no unit within {tolerance:g} m left out)"
    )
    try:
        console.print(str(pre_trend(series, first)), markup=False)
    except InputError as err:
        console.print(f"No pre-trend check: {err}", markup=False)
    ax = plot_over_time(series, (first, last))
    with writing(chart, "chart"), atomic_path(chart) as tmp:
        ax.figure.savefig(tmp, format="png", dpi=120, bbox_inches="tight")
    plt.close(ax.figure)
    console.print(f"Chart written to {chart}")
    if out is not None:
        with writing(out, "table"), atomic_path(out) as tmp:
            series.to_csv(tmp, encoding="utf-8")
        console.print(f"Mean incidents per unit by condition and {freq} written to {out}")
    if effects is not None or effects_out is not None:
        _period_effects(trial, counts, (first, last), effects, effects_out, draws)


def _period_effects(trial, counts, window, chart, table, draws) -> None:
    import matplotlib.pyplot as plt

    from geoexp._atomic import atomic_path
    from geoexp.delivery import effects_by_period, plot_period_effects

    try:
        result = effects_by_period(trial, counts, window, n_draws=draws)
    except InputError as err:
        if "before the trial window" not in str(err):
            raise
        console.print(f"No period before the window ({err}); counts used as they are")
        result = effects_by_period(trial, counts, window, outcome="post", n_draws=draws)
    console.print(str(result), markup=False)
    if chart is not None:
        ax = plot_period_effects(result)
        with writing(chart, "chart"), atomic_path(chart) as tmp:
            ax.figure.savefig(tmp, format="png", dpi=120, bbox_inches="tight")
        plt.close(ax.figure)
        console.print(f"Effects per period written to {chart}")
    if table is not None:
        with writing(table, "table"), atomic_path(table) as tmp:
            result.to_frame().to_csv(tmp, index=False, encoding="utf-8")
        console.print(f"Effects per period (table) written to {table}")
