"""The whole job on the invented sample city, as the README's quick start runs it."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import geopandas as gpd
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
    A4 ``report.pdf`` (a one-page summary for command staff first).
    Returns the paths.
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
    echo(CAUTION)
    return {
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
