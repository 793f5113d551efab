"""The ``presence`` and ``monitor`` commands: was the treatment delivered?"""

from __future__ import annotations

from dataclasses import dataclass, fields
from pathlib import Path
from typing import Annotated, Any, Literal, cast

import typer

from geoexp._paths import check_outputs, writing
from geoexp.cli._app import TestDrawsOpt, app, console
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


@dataclass(frozen=True)
class StayOptions:
    """The options that read presence (GPS pings or a visit log), shared by several commands."""

    pings: Path | None
    visits: Path | None
    device: str
    time: str
    unit_column: str | None
    start: str
    end: str
    team: str | None
    activity: str | None
    lon: str | None
    lat: str | None
    x: str | None
    y: str | None
    crs: str | None
    tolerance: float
    max_gap: float
    max_speed: float
    min_stay: float

    @classmethod
    def of(cls, options: dict[str, Any]) -> StayOptions:
        """Pick these options out of a command's parameters (its ``locals()`` on entry)."""
        return cls(**{f.name: options[f.name] for f in fields(cls)})

    @property
    def inputs(self) -> dict[str, Path]:
        """The input file given, by its option (for the output guard)."""
        given = {"--pings": self.pings, "--visits": self.visits}
        return {k: v for k, v in given.items() if v}

    def load(self, trial: Path):
        """Stays from the pings or the visit log, snapped to the trial's units."""
        from geoexp.delivery import read_visits, stays_from_pings
        from geoexp.trialfile import TrialFile
        from geoexp.units import UnitSet

        if (self.pings is None) == (self.visits is None):
            raise InputError("give either --pings or --visits")
        tf = TrialFile.open(trial)
        units = UnitSet.from_frame(tf.units(), None, source=str(trial))
        if self.pings is not None:
            stays = stays_from_pings(
                self.pings,
                units,
                device=self.device,
                time=self.time,
                x=self.x,
                y=self.y,
                lon=self.lon,
                lat=self.lat,
                crs=self.crs,
                tolerance_m=self.tolerance,
                max_gap_s=self.max_gap,
                max_speed_kmh=self.max_speed,
                min_minutes=self.min_stay,
            )
        else:
            stays = read_visits(
                self.visits,
                units,
                start=self.start,
                end=self.end,
                unit_column=self.unit_column,
                x=self.x,
                y=self.y,
                lon=self.lon,
                lat=self.lat,
                crs=self.crs,
                team_column=self.team,
                activity_column=self.activity,
                tolerance_m=self.tolerance,
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
    reading = StayOptions.of(locals())  # first: the parameters alone
    if freq not in ("day", "week", "period"):
        raise typer.BadParameter(
            f"must be day, week or period; got {freq!r}", param_hint="'--freq'"
        )
    check_outputs({"--out": out}, reading.inputs, trial=trial)
    _, stays = reading.load(trial)
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
    reading = StayOptions.of(locals())  # first: the parameters alone
    import pandas as pd

    from geoexp._atomic import atomic_path
    from geoexp.delivery import RECORD_LAYER, delivery_week, plot_weekly_delivery, weekly_delivery
    from geoexp.trialfile import append_record

    if planned_minutes <= 0:
        raise typer.BadParameter("must be > 0", param_hint="'--planned-minutes'")
    check_outputs(
        {"--chart": chart, "--lists": lists, "--map": map_png}, reading.inputs, trial=trial
    )
    tf, stays = reading.load(trial)
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
    test_draws: TestDrawsOpt = 2000,
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
    reading = StayOptions.of(locals())  # first: the parameters alone
    from geoexp._atomic import atomic_path
    from geoexp.delivery import treatment_received

    if outcome not in ("change", "post"):
        raise typer.BadParameter(
            f"must be change or post; got {outcome!r}", param_hint="'--outcome'"
        )
    measure = cast(Literal["change", "post"], outcome)  # checked just above
    if not 0 < level < 1:
        raise typer.BadParameter("must be between 0 and 1", param_hint="'--level'")
    check_outputs({"--section": section, "--dose-chart": dose_chart}, reading.inputs, trial=trial)
    tf, stays = reading.load(trial)
    result = treatment_received(
        tf, stays, planned_minutes=planned_minutes, outcome=measure, n_draws=test_draws, level=level
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
    test_draws: TestDrawsOpt = 2000,
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
        _period_effects(trial, counts, (first, last), effects, effects_out, test_draws)


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
