"""The whole job on the invented sample city, as the README's quick start runs it."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any, cast

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

from geoexp.briefing import briefing_pack, field_list, save_field_list
from geoexp.cautions import CAUTION
from geoexp.design import Design, DesignSpec, check_design, unit_flow
from geoexp.maps import ZONES_FILENAME, planning_map, save_map
from geoexp.outcomes import ObservedIncidents
from geoexp.power import NegativeBinomialOutcome, power_curve, simulate_power
from geoexp.report import save_check_figures, save_power_figure
from geoexp.sampleregion import DEMO_MULTIPLIERS, load_sample_region, simulate_trial_incidents
from geoexp.trialfile import export_assignment_csv, write_trial
from geoexp.workflow import analyse_trial, count_and_store


def demo_spec(
    region_path: str | Path, out: str | Path, *, exclusion: str | None = None
) -> DesignSpec:
    """Return the demo design: 40 of the top 150 hot-spot segments, kept 150 m apart, bands 150/300 m."""
    data: dict[str, Any] = {
        "name": "Quillmere hot-spot foot patrols (demo)",
        "seed": 20261202,
        "draws": 2000,
        "units": {
            "path": str(Path(region_path).resolve()),
            "layer": "segments",
            "id_column": "segment_id",
        },
        "eligible": {"top_column": "incidents_y1", "top_k": 150},
        "assignment": {
            "method": "complete",
            "treated": 40,
            "gap_m": 150.0,
            "min_pure_controls": 20,
        },
        "exposure": {"bands_m": [150.0, 300.0], "metric": "euclidean"},
        "field": {"district_column": "district", "description_column": "description"},
    }
    if exclusion:
        data["eligible"]["exclude"] = [exclusion]
    return DesignSpec.from_dict(data, base_dir=str(Path(out).resolve()), source="demo spec")


def run_demo(out: str | Path, *, n_draws: int = 2000, echo: Callable[[str], None] = print) -> dict:
    """Run the whole job on the sample city, from planning to the analysis report.

    Writes into ``out``: ``design.toml``, ``exclusion_zones.geojson`` (a drawn
    zone around the city's stadium block, with its reason), ``trial.gpkg``
    (locked; a rerun of the demo replaces it and keeps the old draw as
    superseded), ``design_check.md`` with its figures
    (``design_check_probability.png``, ``design_check_balance.png``,
    ``design_check_flow.png``, ``power_curve.png``), ``field_list.csv`` and
    ``field_places.geojson`` (the treated places for patrols, numbered as in
    the briefing pack), ``assignment_for_analysts.csv`` (every eligible unit and
    its condition; not for field teams), ``planning_map.html``,
    ``briefing_a4.pdf``, ``incidents.csv`` (the invented
    incidents, the trial year simulated with a planted effect),
    ``incidents_not_counted.csv``, ``report.html`` with ``report.md`` and the
    A4 ``report.pdf`` (a one-page summary for command staff first; with the
    section "Over time", incidents per unit by condition per month), and the
    delivery outputs of :func:`demo_delivery`. Returns the paths.
    """
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    region = load_sample_region()
    region_path: str | Path | None = region.path
    if region_path is None:
        from geoexp.sampleregion import write_sample_region

        region_path = out / "quillmere.gpkg"
        write_sample_region(region, region_path)
    echo(
        f"Sample region: {region.name} ({len(region.segments):,} street segments) from {region_path}"
    )

    # An exclusion zone as a planner would draw it on the web map (WGS 84 lon/lat).
    districts = region.districts.to_crs(4326)
    centre = shapely.centroid(districts.geometry.iloc[0])
    zone = gpd.GeoDataFrame(
        {"reason": ["stadium block: event policing already in place"]},
        geometry=[shapely.buffer(centre, 0.002)],
        crs=4326,
    )
    zone_path = out / ZONES_FILENAME  # the name the map's "Save zones" button writes
    zone.to_file(zone_path, driver="GeoJSON", engine="pyogrio")

    spec = demo_spec(region_path, out, exclusion=zone_path.name)
    spec = spec.replace(draws=n_draws)
    spec_path = out / "design.toml"
    spec.to_toml(spec_path)
    echo(f"Design spec: {spec_path} (hash {spec.short_hash})")

    design = Design.from_spec(spec)
    for note in design.notes:
        echo(f"  {note}")
    assignment = design.draw()
    check = check_design(design, assignment=assignment)
    echo(str(check))
    check_path = out / "design_check.md"
    # Power of the same design for the effects the demo plants later (as rate ratios), under
    # the model the demo's trial year is simulated with: each segment's mean count over the
    # two years, Poisson noise (dispersion 0). Real data are noisier: try dispersion 0.5 too.
    frame = design.units.frame
    level = (frame["incidents_y1"] + frame["incidents_y2"]).to_numpy() / 2.0 + 0.05
    model = NegativeBinomialOutcome(level, 0.0, DEMO_MULTIPLIERS)
    power = simulate_power(design, model, n_sims=200, n_draws=500)
    echo(str(power))
    flow = unit_flow(design, assignment)
    echo(str(flow))
    figures = save_check_figures(check, flow, out)
    # The power curve: the same simulation at other effects and numbers treated (fewer
    # simulated trials per point than the table above, to keep the demo quick).
    curve = power_curve(design, model, rate_ratios=(0.5, 0.7, 0.9), n_sims=100, n_draws=200)
    echo(str(curve))
    figures.append(save_power_figure(curve, out / "power_curve.png"))
    echo("Planning figures: " + ", ".join(str(f) for f in figures))
    check_path.write_text(
        check.to_markdown() + "\n\n## Power\n\n" + str(power) + "\n\n" + CAUTION + "\n",
        encoding="utf-8",
    )

    trial_path = out / "trial.gpkg"
    trial = write_trial(
        trial_path, design, assignment, check.probabilities, replace=True, reason="demo rerun"
    )
    # Patrols get the treated places only; the analyst's list of every eligible unit and
    # its condition is a separate file that is not handed to field teams.
    csv_path, geojson_path = out / "field_list.csv", out / "field_places.geojson"
    save_field_list(field_list(trial), csv_path, geojson_path)
    analyst_path = out / "assignment_for_analysts.csv"
    export_assignment_csv(trial, analyst_path)
    echo(str(assignment))
    echo(f"Trial file (locked): {trial_path}")
    echo(f"Field list (treated places only, numbered as in the briefing pack): {csv_path}")
    echo(f"Treated places for phones (GeoJSON): {geojson_path}")
    echo(f"Assignment of every eligible unit (analysts only): {analyst_path}")
    # The invented city lies in open ocean: a plain background instead of tiles, and its
    # own district polygons, the same on the planning map, the pack and the result map.
    map_path = save_map(
        planning_map(trial, districts=region.districts, tiles=None), out / "planning_map.html"
    )
    echo(f"Planning map (works offline): {map_path}")
    pack_path = briefing_pack(
        trial, out / "briefing_a4.pdf", paper="a4", district_polygons=region.districts
    )
    echo(f"Briefing pack for field teams: {pack_path}")

    # After the trial. The sample city has invented incidents for 2024 and 2025; the trial
    # year 2026 is simulated with effects planted on purpose (DEMO_MULTIPLIERS), and the
    # incidents are exported as an agency would: a CSV with longitude and latitude.
    echo(
        "Simulating the trial year 2026 (invented incidents with a planted effect: "
        + ", ".join(
            f"{'spillover band ' + k.split('_')[1] if k.startswith('spillover_') else k} x{v}"
            for k, v in DEMO_MULTIPLIERS.items()
        )
        + ")"
    )
    simulated = simulate_trial_incidents(region, trial.assignment()["condition"])
    incidents = pd.concat([region.incidents, simulated], ignore_index=True).to_crs(4326)
    table = pd.DataFrame(
        {
            "incident_id": incidents["incident_id"],
            "date": pd.to_datetime(incidents["date"]).dt.strftime("%Y-%m-%d"),
            "incident_type": incidents["incident_type"],
            "lon": incidents.geometry.x.round(7),
            "lat": incidents.geometry.y.round(7),
        }
    )
    incidents_path = out / "incidents.csv"
    table.to_csv(incidents_path, index=False)
    observed = ObservedIncidents(
        incidents_path,
        pre=("2025-01-01", "2025-12-31"),
        post=("2026-01-01", "2026-12-31"),
        date_column="date",
        type_column="incident_type",
        lon="lon",
        lat="lat",
        tolerance_m=30.0,
    )
    outcomes = count_and_store(trial_path, observed, dropped_path=out / "incidents_not_counted.csv")
    echo(str(outcomes.drops))
    run = analyse_trial(
        trial_path,
        report=out / "report.html",
        result_map=out / "results_map.html",
        n_draws=n_draws,
        districts=region.districts,
        tiles=None,
        incidents=observed,
        period="month",
    )
    analysis, report, report_md, results_map = (
        run.analysis,
        run.report,
        run.report_md,
        run.result_map,
    )
    echo(f"Interactive results map: {results_map}")
    echo(str(analysis))
    echo(f"Report: {report} (Markdown twin: {report_md})")
    echo(f"PDF report, summary for command staff first: {run.report_pdf}")
    delivery = demo_delivery(trial_path, out, n_draws=n_draws, echo=echo)
    echo(CAUTION)
    return {
        **delivery,
        "spec": spec_path,
        "trial": trial_path,
        "check": check_path,
        "field_list": csv_path,
        "field_places": geojson_path,
        "analyst_list": analyst_path,
        "exclusion": zone_path,
        "planning_map": map_path,
        "briefing": pack_path,
        "incidents": incidents_path,
        "report": report,
        "report_md": report_md,
        "report_pdf": run.report_pdf,
        "figures": figures,
    }


# The demo's patrols: two weeks of pings at the start of the trial year, 10 devices every
# 60 s, most stops sent to treated places, the rest wherever the patrol happens to be.
DEMO_PINGS = 200_000
DEMO_DEVICES = 10
DEMO_PLANNED_MINUTES = 120.0  # planned presence per treated place per week, for the monitor
DEMO_MONITOR_WEEK = "2026-01-05"


def demo_delivery(
    trial_path: str | Path,
    out: str | Path,
    *,
    n_draws: int = 2000,
    echo: Callable[[str], None] = print,
) -> dict[str, Path]:
    """Simulate patrol pings for the demo trial, run the weekly monitor and the complier effect.

    Patrol devices are simulated (:func:`geoexp.sampleregion.simulate_pings`)
    with imperfect delivery: most stops at treated places, the rest where a
    random walk leads, so some treated places are under-served and some
    control places are visited. Writes into ``out``: ``pings.parquet``; the
    monitor for the week of 5 January 2026 (``delivery_week.md``,
    ``delivery_lists.csv``, ``delivery_chart.png``, ``delivery_map.png``; the
    week's rows appended to the trial file's ``delivery_weekly`` layer); and
    the effect of treatment received, the dose being minutes present in the
    post-period (Angrist, Imbens & Rubin 1996; interval by inverting the
    design's randomization test, Imbens & Rosenbaum 2005) in
    ``treatment_received.md`` and ``treatment_received.csv``.

    Returns
    -------
    dict of str to pathlib.Path
        The files written, by name.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.figure import Figure

    from geoexp.delivery import (
        RECORD_LAYER,
        delivery_week,
        plot_weekly_delivery,
        stays_from_pings,
        treatment_received,
        weekly_delivery,
    )
    from geoexp.maps import delivery_map_static
    from geoexp.sampleregion import simulate_pings
    from geoexp.trialfile import TrialFile, append_record
    from geoexp.units import UnitSet

    out = Path(out)
    tf = TrialFile.open(trial_path)
    layer = tf.units()
    assignment = tf.assignment()
    treated = assignment.index[assignment["condition"] == "treated"]
    favoured = np.flatnonzero(layer.index.isin(treated))
    pings = simulate_pings(
        layer.geometry.to_numpy(),
        DEMO_PINGS,
        n_devices=DEMO_DEVICES,
        interval_s=60.0,
        favoured=favoured,
        favour_share=0.08,
        start="2026-01-05T08:00:00",
        rng=20261203,
    )
    pings_path = out / "pings.parquet"
    pings[["device", "time", "x", "y"]].to_parquet(pings_path, index=False)
    echo(
        f"Simulated patrol pings: {len(pings):,} pings of {DEMO_DEVICES} devices from "
        f"{pings['time'].min()} to {pings['time'].max()} -> {pings_path}"
    )
    units = UnitSet.from_frame(layer, None, source=str(trial_path))
    stays = stays_from_pings(pings_path, units, x="x", y="y", crs=layer.crs)
    weekly = stays.dosage("week")
    summary = delivery_week(
        assignment, weekly, DEMO_MONITOR_WEEK, planned_minutes=DEMO_PLANNED_MINUTES
    )
    words = _monitor_words(summary)
    echo(words)
    week_path = out / "delivery_week.md"
    week_path.write_text(f"# Delivery monitor\n\n{words}\n\n{CAUTION}\n", encoding="utf-8")
    under = summary.under_served.assign(condition="treated", issue="under-served")
    visited = summary.visited_controls.assign(issue="control visited", shortfall_minutes=0.0)
    lists = pd.concat([under, visited])
    lists.index.name = assignment.index.name
    lists_path = out / "delivery_lists.csv"
    lists.to_csv(lists_path, encoding="utf-8")
    chart_path = out / "delivery_chart.png"
    ax = plot_weekly_delivery(
        weekly_delivery(assignment, weekly, planned_minutes=DEMO_PLANNED_MINUTES),
        DEMO_PLANNED_MINUTES,
    )
    ax.figure.savefig(chart_path, dpi=120, bbox_inches="tight")
    plt.close(ax.figure)
    map_path = out / "delivery_map.png"
    column = tf.spec().field.district_column
    ax = delivery_map_static(
        layer, summary, district_column=column if column in layer.columns else None
    )
    figure = cast(Figure, ax.figure)  # the map's own figure, never a subfigure
    figure.savefig(map_path, dpi=120, bbox_inches="tight")
    plt.close(figure)
    append_record(trial_path, RECORD_LAYER, summary.record())
    echo(
        f"Delivery monitor, week of {summary.week}: {week_path}, lists {lists_path}, "
        f"chart {chart_path}, map {map_path}; recorded in {trial_path} (layer '{RECORD_LAYER}')"
    )
    received = treatment_received(tf, stays, n_draws=n_draws)
    echo(str(received))
    received_md, received_csv = out / "treatment_received.md", out / "treatment_received.csv"
    received_md.write_text(received.to_markdown() + "\n\n" + CAUTION + "\n", encoding="utf-8")
    received.to_frame().to_csv(received_csv, index=False)
    echo(f"Effect of treatment received (complier effect): {received_md}, {received_csv}")
    return {
        "pings": pings_path,
        "delivery_week": week_path,
        "delivery_lists": lists_path,
        "delivery_chart": chart_path,
        "delivery_map": map_path,
        "received": received_md,
        "received_csv": received_csv,
    }


def _monitor_words(summary) -> str:
    """Say the monitor's week in plain words, one line per exposure condition."""
    lines = [
        f"Delivery in the week of {summary.week} (planned dose {summary.planned_minutes:g} "
        "minutes per treated place per week):"
    ]
    for condition, row in summary.by_condition.iterrows():
        name = str(condition)
        if name.startswith("spillover_"):
            name = f"spillover band {name.removeprefix('spillover_')}"
        lines.append(
            f"- {name.replace('_', ' ')}: {int(row['places']):,} places, "
            f"{row['at_dose_share']:.0%} at the planned dose, "
            f"{row['any_presence_share']:.0%} with any presence, "
            f"{row['mean_minutes']:,.1f} minutes present and {row['mean_visits']:.2f} visits "
            "per place"
        )
    lines.append(
        f"{len(summary.under_served):,} treated places under the planned dose; "
        f"{len(summary.visited_controls):,} control places with presence (contamination)"
    )
    return "\n".join(lines)
