"""Exclusion zones on the interactive maps: the zones in force, with the reason for each."""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path

import geopandas as gpd

from geoexp.maps._geometry import read_polygons
from geoexp.maps._page import Page, fill_sample, legend_row
from geoexp.maps._web import feature_collection, to_web

REASON_COLUMN = "reason"
NO_REASON = "no reason recorded"
ZONE_STYLE = {
    "color": "#000000",
    "weight": 1.5,
    "fillColor": "#000000",
    "fillOpacity": 0.1,
    "dashArray": "2 3",
}


def zone_reasons(frame: gpd.GeoDataFrame) -> list[str]:
    """Each zone's reason (the ``reason`` column a saved zone file carries), or a plain note."""
    if REASON_COLUMN not in frame.columns:
        return [NO_REASON] * len(frame)
    return [
        str(r).strip() if isinstance(r, str) and str(r).strip() else NO_REASON
        for r in frame[REASON_COLUMN]
    ]


def add_zones(page: Page, sources: Sequence[str | os.PathLike], crs) -> int:
    """Show the exclusion zones of ``sources`` (files), each with its reason; return their count.

    A zone file that cannot be found is named in the legend as not shown, so a
    map never hides that a zone was meant to be in force.
    """
    shown = 0
    for k, source in enumerate(sources):
        name = Path(source).name
        if not Path(source).exists():
            page.legend.append(legend_row("", f"zone file {name} not found: its zones not shown"))
            continue
        frame = read_polygons(source, "exclusion zones", crs)
        reasons = zone_reasons(frame)
        key = f"zones_{k + 1}"
        props = [
            {"name": f"Excluded: {reason} ({name}, zone {j + 1})", "reason": reason}
            for j, reason in enumerate(reasons)
        ]
        page.datasets[key] = {
            "data": feature_collection(to_web(frame.geometry, 0.0), props),
            "meta": {},
        }
        page.declare(
            f"zones:{k + 1}",
            f"Exclusion zones in {name}",
            key,
            True,
            len(frame),
            kind="plain",
            tip="name",
            style=ZONE_STYLE,
        )
        sample = fill_sample("#000000", 0.12, "#000000")
        for j, reason in enumerate(reasons):
            page.legend.append(legend_row(sample, f"excluded zone {j + 1} ({name}): {reason}"))
        shown += len(frame)
    return shown


def zones_in_force(spec) -> list[Path]:
    """The exclusion zone files a design spec reads, resolved against the spec's folder."""
    return [Path(spec.resolve(z)) for z in spec.eligible.exclude]
