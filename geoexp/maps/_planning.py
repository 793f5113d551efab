"""The interactive planning map of a drawn trial (folium), with the drawing tool for zones."""

from __future__ import annotations

import os

import geopandas as gpd
import numpy as np
import pandas as pd

from geoexp.errors import InputError
from geoexp.maps._geometry import band_rings, district_outlines, ring_labels
from geoexp.maps._page import (
    DRAW_NOTE,
    NEVER_COLOUR,
    Page,
    add_districts,
    add_eligible,
    add_rings,
    finish_drawable,
    legend_row,
    line_sample,
    prob_breaks,
    prob_colours,
    style_js,
)
from geoexp.maps._palette import condition_order, condition_style
from geoexp.maps._web import unit_dataset
from geoexp.maps._zones import add_zones, zones_in_force


def planning_map(
    trial,
    *,
    districts: str | os.PathLike | gpd.GeoDataFrame | None = None,
    tiles: str | None = "auto",
):
    """Interactive planning map of a drawn trial, with a tool to draw exclusion zones.

    Layers the reader can switch on and off: districts, straight-line buffer
    rings at the design's band distances around the treated units, eligible
    units (a broad halo), one layer per exposure condition (treated, each
    spillover band, pure control; colours from Okabe & Ito (2008) and a line
    width and dash pattern per condition, so the map also reads in grey), and
    one layer per condition with every unit's probability of being in it
    (hidden at first; viridis colours, van der Walt & Smith 2015, over classes
    of equal counts fitted to the layer's own values, printed with their bounds). Tooltips
    give unit id, street description, district, condition and probabilities.
    The exclusion zones the design's spec reads (``[eligible] exclude``) are
    shown with the reason each carries. A legend, a scale bar, and a drawing tool for polygons and rectangles
    whose "Save zones" button writes a GeoJSON file that the design spec's
    ``[eligible] exclude = [...]`` accepts back.

    Parameters
    ----------
    trial : TrialFile or path
        A trial file with a drawn assignment.
    districts : path or GeoDataFrame, optional
        District polygons. By default outlines drawn around each district's
        units (from the spec's ``district_column``); see
        :func:`district_outlines`.
    tiles : str or None
        ``"auto"`` (OpenStreetMap), None for a plain background (for invented
        places, such as the sample city), or any tile name or URL template
        folium accepts.

    Returns
    -------
    folium.Map
        Save it with :func:`save_map` to get a page that works offline.
    """
    from geoexp.cautions import CAUTION
    from geoexp.trialfile import TrialFile

    tf = trial if isinstance(trial, TrialFile) else TrialFile.open(trial)
    if not tf.is_locked or "assignment" not in tf.layers:
        raise InputError(
            f"trial file {str(tf.path)!r} holds no drawn assignment yet; draw one first, or make "
            "a draw-only map of the eligible units (command line: geoexp map SPEC --draw-only)"
        )
    spec = tf.spec()
    units = tf.units()
    assignment = tf.assignment().drop(columns="geometry")
    missing = units.index.difference(assignment.index)
    if len(missing):
        from geoexp.errors import describe_rows

        raise InputError(
            f"trial file {str(tf.path)!r}: {len(missing)} units have no row in the assignment "
            f"layer: ids {describe_rows(missing)}"
        )
    assignment = assignment.reindex(units.index)
    codes = condition_order(assignment["condition"].unique())
    labels = (
        assignment.drop_duplicates("condition").set_index("condition")["condition_label"].to_dict()
    )
    bands = list(spec.exposure.bands_m)
    prob_codes = [
        c for c in condition_order([col[2:] for col in assignment.columns if col.startswith("p_")])
    ]
    for c in prob_codes:
        labels.setdefault(c, c.replace("_", " "))

    title = tf.meta.get("name", spec.name)
    page = Page(units, tiles, title)

    eligible = assignment["eligible"].astype(bool).to_numpy()
    extra = pd.DataFrame(
        {
            "c": assignment["condition"].astype(str),
            "e": eligible.astype(int),
            "p": list(
                np.round(
                    assignment[[f"p_{c}" for c in prob_codes]].to_numpy(dtype=float), 3
                ).tolist()
            ),
        },
        index=units.index,
    )
    page.datasets["units"] = unit_dataset(
        units,
        spec.field.description_column,
        spec.field.district_column,
        extra,
        {"labels": labels, "prob_labels": [labels[c] for c in prob_codes]},
    )

    dist_frame, how = district_outlines(units, spec.field.district_column, districts)
    add_districts(page, dist_frame, how)

    # Rings around the treated units at the band distances.
    treated = units.geometry[assignment["treated"].astype(bool).to_numpy()]
    if len(treated) and bands:
        rings = band_rings(treated, bands)
        group = page.group(
            "Spillover bands " + ", ".join(f"{b:g}" for b in bands) + f" m ({len(rings)})", True
        )
        add_rings(page, group, rings, ring_labels(bands), fill_opacity=0.12, sample_opacity=0.18)
        if spec.exposure.metric != "euclidean":
            page.legend.append(
                legend_row(
                    "",
                    f"(rings are straight-line; the design measures {spec.exposure.metric} distance)",
                )
            )

    add_eligible(page, int(eligible.sum()))
    counts = assignment["condition"].value_counts()
    # Draw pure controls first and treated last, so treated lines sit on top.
    for code in reversed(codes):
        n = int(counts.get(code, 0))
        page.declare(
            f"condition:{code}",
            labels[code].capitalize(),
            "units",
            True,
            n,
            kind="condition",
            code=code,
            style=style_js(code),
            tip="unit",
        )
    for code in codes:
        s = condition_style(code)
        page.legend.append(
            legend_row(
                line_sample(s.colour, s.width, s.dash_array),
                f"{labels[code]} ({int(counts.get(code, 0)):,})",
            )
        )
    page.legend.append(
        legend_row("", "Probability layers (hidden at first; classes of equal counts):")
    )
    page.legend.append(legend_row(line_sample(NEVER_COLOUR, 1, "2 3"), "probability 0 (never)"))
    for j, code in enumerate(prob_codes):
        breaks = prob_breaks(assignment[f"p_{code}"].to_numpy(dtype=float))
        colours = prob_colours(max(1, len(breaks) - 1))
        page.declare(
            f"probability:{code}",
            f"P({labels[code]})",
            "units",
            False,
            len(units),
            kind="probability",
            index=j,
            weight=3,
            tip="unit",
            breaks=breaks,
            colours=colours,
        )
        if not breaks:
            page.legend.append(legend_row("", f"P({labels[code]}): no unit can be in it"))
            continue
        if code == "treated":
            page.legend.append(legend_row("", f"P({labels[code]}), {len(colours)} classes:"))
            for k, col in enumerate(colours):
                page.legend.append(
                    legend_row(
                        line_sample(col, 3, None),
                        f"{'above ' if k else ''}{breaks[k]:.3f} to {breaks[k + 1]:.3f}",
                    )
                )
        else:
            bounds = " | ".join(f"{breaks[k]:.3f}–{breaks[k + 1]:.3f}" for k in range(len(colours)))
            page.legend.append(legend_row("", f"P({labels[code]}) classes, same colours: {bounds}"))

    # The zones in force are the design's own: they decided which units were eligible.
    add_zones(page, zones_in_force(spec), units.crs)
    draw_group = page.group("Drawn exclusion zones", True)
    drawn_at = tf.meta.get("drawn_at", "")[:10]
    notes = [
        f"design {tf.spec_hash[:12]} · seed {tf.meta.get('seed', '?')} · drawn {drawn_at} · "
        f"{tf.meta.get('n_draws', '?')} Monte Carlo draws",
        DRAW_NOTE,
    ]
    return finish_drawable(page, draw_group, notes, CAUTION)
