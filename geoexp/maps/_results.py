"""The interactive result map: the change observed at each unit, by condition, with the bands and the verdict.

Two views of one analysis. :func:`result_map_static` draws a matplotlib map
for the report and for print; :func:`result_map` makes the interactive
folium page, saved offline with :func:`~geoexp.maps.save_map`. Both colour
every unit by its observed change (post-period minus pre-period count) on a
diverging scale centred on no change, tell the conditions apart by the line
width and dash pattern of :func:`~geoexp.maps.condition_style` (so they
read in grey), draw the spillover bands as translucent rings at the design's
band distances around the treated units, and carry the estimates and the
verdict sentences of the analysis.

The colours of a single unit are what happened there, not an effect: the
effect of a condition is the contrast of its units with the pure controls,
which the legend and caption give with their intervals.
"""

from __future__ import annotations

import html
import os
from pathlib import Path
from typing import TYPE_CHECKING

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

from geoexp.cautions import CAUTION
from geoexp.maps._geometry import district_outlines, ring_labels
from geoexp.maps._page import (
    Page,
    add_districts,
    add_rings,
    legend_row,
    line_sample,
    page_element,
    save_map,
)
from geoexp.maps._palette import condition_order, condition_style
from geoexp.maps._result_data import (
    CASING_COLOUR,
    CHANGE_CMAP,
    LEGEND_WIDTH_PX,
    MAP_BACKGROUND,
    RING_FILL_OPACITY,
    TREATED_CASING,
    ResultData,
    change_colours,
    change_limit,
    gather,
    treated_rings,
)
from geoexp.maps._web import unit_dataset

if TYPE_CHECKING:
    from geoexp.analysis import Analysis
    from geoexp.trialfile import TrialFile


def result_map(
    analysis: Analysis,
    trial: TrialFile | str | os.PathLike,
    *,
    tiles: str | None = "auto",
    districts: str | os.PathLike | gpd.GeoDataFrame | None = None,
):
    """Interactive map of the observed change per unit by condition, with estimates and verdicts.

    Switchable layers: districts, the spillover bands as translucent rings at
    the design's band distances around the treated units, and one layer per
    condition (treated, each spillover band, pure control) whose units are
    coloured by their observed change, post-period minus pre-period count
    (ColorBrewer's RdBu, Harrower & Brewer 2003, centred on no change), drawn
    in the condition's line width and dash pattern over a dark casing. Tooltips
    give unit id, street description, district, condition, pre, post, change
    and the exposure probabilities. The legend gives the colour scale, each
    contrast's estimate with its interval and p-value, the verdict sentences
    and the caution. Save it with :func:`~geoexp.maps.save_map`, which makes
    the page work offline.

    Parameters
    ----------
    analysis : Analysis
        The result of :func:`geoexp.analysis.analyse`.
    trial : TrialFile or path
        The trial file the analysis was made from.
    tiles : str or None
        ``"auto"`` (OpenStreetMap), None for a plain background (for invented
        places, such as the sample city), or any tile name or URL template
        folium accepts.
    districts : path or GeoDataFrame, optional
        District polygons, as in :func:`result_map_static`.

    Returns
    -------
    folium.Map

    Raises
    ------
    InputError
        If the analysis does not belong to the trial file.
    """
    data = gather(analysis, trial)
    units = data.units
    per_unit = data.per_unit
    page = Page(units, tiles, data.title)
    # Keep the units clear of the legend, which is tall on the right.
    web = gpd.GeoSeries([shapely.box(*units.total_bounds)], crs=units.crs).to_crs("EPSG:4326")
    w, s, e, n = web.total_bounds
    page.map.fit_bounds(
        [[s, w], [n, e]], padding_top_left=(20, 20), padding_bottom_right=(LEGEND_WIDTH_PX, 20)
    )
    prob_codes = condition_order(c[2:] for c in per_unit.columns if c.startswith("p_"))
    labels = dict(data.labels)
    for c in prob_codes:
        labels.setdefault(c, c.replace("_", " "))
    extra = pd.DataFrame(
        {
            "c": per_unit["condition"].astype(str),
            "e": per_unit["eligible"].astype(bool).astype(int),
            "p": list(per_unit[[f"p_{c}" for c in prob_codes]].to_numpy(dtype=float)),
        },
        index=per_unit.index,
    )
    page.datasets["units"] = unit_dataset(
        units,
        data.description_column,
        data.district_column,
        extra,
        {"labels": labels, "prob_labels": [labels[c] for c in prob_codes]},
    )
    limit = change_limit(data.change)
    palette, colour_of = np.unique(
        change_colours(data.change, limit).astype(str), return_inverse=True
    )
    values = {
        "id": per_unit.index.astype(str).tolist(),
        "pre": _numbers(per_unit["pre"]),
        "post": _numbers(per_unit["post"]),
        "change": _numbers(per_unit["change"]),
        "colour": colour_of.astype(int).tolist(),
        "palette": palette.tolist(),
    }

    dist_frame, how = district_outlines(units, data.district_column, districts)
    add_districts(page, dist_frame, how)

    rings = treated_rings(data)
    if rings is not None:
        group = page.group(
            "Spillover bands: " + ", ".join(f"{b:g}" for b in data.bands) + " m", True
        )
        add_rings(
            page,
            group,
            rings,
            ring_labels(data.bands),
            fill_opacity=RING_FILL_OPACITY,
            sample_opacity=RING_FILL_OPACITY + 0.06,
        )

    # Pure controls first and treated last, so treated units sit on top.
    for code in reversed(data.codes):
        s = condition_style(code)
        n = data.counts[code]
        group = page.group(f"{data.labels[code].capitalize()} ({n:,})", True)
        casing = 3.0 if code == "treated" else 1.5
        style = {"weight": s.width, "opacity": 1, "lineCap": "butt"}
        if s.dash_array:
            style["dashArray"] = s.dash_array
        page.layers.append(
            {
                "key": f"casing:{code}",
                "group": group.get_name(),
                "data": "units",
                "expected": n,
                "kind": "condition",
                "code": code,
                "tip": "none",
                "style": {
                    **style,
                    "weight": s.width + casing,
                    "color": TREATED_CASING if code == "treated" else CASING_COLOUR,
                },
            }
        )
        page.layers.append(
            {
                "key": f"condition:{code}",
                "group": group.get_name(),
                "data": "units",
                "expected": n,
                "kind": "condition",
                "code": code,
                "tip": "unit",
                "coloured": True,
                "style": style,
            }
        )
        if not data.polygonal:
            # A white centre stripe over units whose count fell: the sign survives greyscale.
            page.layers.append(
                {
                    "key": f"decrease:{code}",
                    "group": group.get_name(),
                    "data": "units",
                    "expected": int(
                        np.sum((data.per_unit["condition"] == code) & (data.change < 0))
                    ),
                    "kind": "decrease",
                    "code": code,
                    "tip": "none",
                    "style": {**style, "weight": stripe_width(s.width), "color": "#ffffff"},
                }
            )
    return _finish(page, data, analysis, values, limit)


def stripe_width(width: float) -> float:
    """Width of the white centre stripe marking a fall in the count, for a line ``width`` wide."""
    return max(1.0, round(0.35 * width, 2))


def _sign_sample() -> str:
    return (
        '<svg width="44" height="14" aria-hidden="true">'
        '<line x1="2" y1="7" x2="42" y2="7" stroke="#2166ac" stroke-width="6"/>'
        '<line x1="2" y1="7" x2="42" y2="7" stroke="#ffffff" stroke-width="2"/></svg>'
    )


def _numbers(column: pd.Series) -> list:
    """Whole numbers as ints (counts stay short in the page), others to 6 decimals."""
    x = column.to_numpy(dtype=float)
    whole = np.isfinite(x) & (x == np.round(x))
    return [
        int(v) if w else (None if not np.isfinite(v) else round(float(v), 6))
        for v, w in zip(x.tolist(), whole.tolist(), strict=True)
    ]


def _ramp_html(limit: float, clipped: bool) -> str:
    from matplotlib import colormaps
    from matplotlib.colors import to_hex

    cmap = colormaps[CHANGE_CMAP]
    stops = ", ".join(to_hex(cmap(x)) for x in np.linspace(0, 1, 11))
    low, high = (f"≤ −{limit:g}", f"≥ +{limit:g}") if clipped else (f"−{limit:g}", f"+{limit:g}")
    low, high = f"{low} fewer", f"{high} more"
    return (
        '<div class="geoexp-ramp-title">Observed change per unit, post − pre (incidents)</div>'
        f'<div class="geoexp-ramp" style="background: linear-gradient(to right, {stops});"></div>'
        f'<div class="geoexp-ramp-labels"><span>{html.escape(low)}</span><span>0</span>'
        f"<span>{html.escape(high)}</span></div>"
    )


def _interval(effect, verdict) -> str:
    low, high = verdict.ci_low, verdict.ci_high
    if not (np.isfinite(low) or np.isfinite(high)):
        low, high = effect.ci_low, effect.ci_high
    return f"{low:+.2f} to {high:+.2f}"


def _estimates_html(data: ResultData, analysis: Analysis) -> str:
    level = int(round(100 * analysis.level))
    head = f"<tr><th>vs pure control</th><th>estimate</th><th>{level}% interval</th><th>p</th></tr>"
    body = "".join(
        f"<tr><td>{html.escape(data.labels[code])}</td><td>{e.estimate:+.2f}</td>"
        # the interval printed beside the verdict: the inversion of the test whose p is shown
        f"<td>{_interval(e, v)}</td>"
        f"<td>{f'{v.p_value:.2g}' if np.isfinite(v.p_value) else 'n/a'}</td></tr>"
        for code, e, v in data.rows
    )
    return f'<table class="geoexp-est" id="geoexp-estimates">{head}{body}</table>'


def _finish(page: Page, data: ResultData, analysis: Analysis, values: dict, limit: float):
    folium = page.folium
    folium.LayerControl(collapsed=False, position="topright").add_to(page.map)
    clipped = bool(np.nanmax(np.abs(data.change), initial=0.0) > limit)
    rows = []
    for code in data.codes:
        s = condition_style(code)
        rows.append(
            legend_row(
                line_sample("#777777", s.width, s.dash_array),
                f"{data.labels[code]} ({data.counts[code]:,})",
            )
        )
    if not data.polygonal:
        rows.append(
            legend_row(_sign_sample(), "count fell: white centre stripe (rose or unchanged: solid)")
        )
    verdicts = "".join(
        f'<li class="geoexp-verdict">{html.escape(v.sentence)}</li>' for v in analysis.verdicts
    )
    legend = "".join(
        [
            f"<h4>{html.escape(data.title)}: results</h4>",
            f'<div class="sub">{html.escape(data.subtitle)}</div>',
            _ramp_html(limit, clipped),
            "<table>" + "".join(rows) + "".join(page.legend) + "</table>",
            '<div class="geoexp-section">Estimates</div>',
            _estimates_html(data, analysis),
            '<div class="geoexp-section">Verdict</div>',
            f'<ul class="geoexp-verdicts" id="geoexp-verdicts">{verdicts}</ul>',
            '<div class="note">Colours show what happened at each unit, not an effect; '
            "each effect compares a condition's units with the pure controls. Rings are "
            "straight-line distances from the treated units.</div>",
            f'<div class="caution">{html.escape(CAUTION)}</div>',
        ]
    )
    _result_script(page, values, legend)
    return page.map


def _result_script(page: Page, values: dict, legend_html: str):
    """The result page's own element, from ``assets/results_page.html.j2``."""
    cfg = {"layers": page.layers, "background": MAP_BACKGROUND if page.tiles is None else None}
    return page_element(
        page, "results_page.html.j2", cfg, legend_html, name="GeoexpResults", values=values
    )


def save_result_map(
    analysis: Analysis,
    trial: TrialFile | str | os.PathLike,
    path: str | os.PathLike,
    *,
    tiles: str | None = "auto",
    districts: str | os.PathLike | gpd.GeoDataFrame | None = None,
) -> Path:
    """Make :func:`result_map` and write it with :func:`~geoexp.maps.save_map`; return the path.

    Parameters
    ----------
    analysis : geoexp.analysis.Analysis
        The analysis to map.
    trial : TrialFile, str or os.PathLike
        The trial file it was computed from.
    path : str or os.PathLike
        The HTML page to write.
    tiles : str or None, default "auto"
        Background tiles, as for :func:`result_map`.
    districts : str, os.PathLike or geopandas.GeoDataFrame, optional
        District polygons to draw instead of outlines around the units.

    Returns
    -------
    pathlib.Path
        The page written.
    """
    return save_map(result_map(analysis, trial, tiles=tiles, districts=districts), Path(path))
