"""Result maps: the change observed at each unit, by condition, with the bands and the verdict.

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
import textwrap
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

from geoexp.cautions import CAUTION
from geoexp.errors import GeometryError, InputError, describe_rows
from geoexp.maps._palette import condition_order, condition_style
from geoexp.maps._planning import (
    _SCRIPT_CLOSE,
    _SCRIPT_EXPAND,
    _SCRIPT_LAYERS,
    _SCRIPT_OPEN,
    _SHARED_CSS,
    NEVER_COLOUR,
    _add_districts,
    _add_rings,
    _districts_layer,
    _is_sample_city,
    _legend_row,
    _line_sample,
    _metres_per_unit,
    _Page,
    _ring_labels,
    _rings,
    _script_element,
    _unit_dataset,
)

if TYPE_CHECKING:
    from matplotlib.axes import Axes

    from geoexp.analysis import Analysis
    from geoexp.trialfile import TrialFile

# Diverging colours for the change: ColorBrewer's RdBu (Harrower & Brewer,
# 2003), reversed so that fewer incidents are blue and more are red. It is
# one of their colour-blind-safe diverging schemes; the pale middle is "no
# change", which is why every line gets a dark casing.
CHANGE_CMAP = "RdBu_r"
# Where the colour scale saturates: this quantile of |change|, so that a few
# extreme units do not wash out everything else.
SATURATION_QUANTILE = 0.95
# Print widths are the web widths (CSS px) scaled to points for an A4/Letter-sized figure.
PRINT_WIDTH = 0.5
CASING_COLOUR = "#3a3a3a"
TREATED_CASING = "#000000"
RING_FILL_OPACITY = 0.16
MAP_BACKGROUND = "#f3f1ec"
LEGEND_WIDTH_PX = 360


# ------------------------------------------------------------------ the data


@dataclass(frozen=True, eq=False)
class _ResultData:
    """Units with geometry and results, in the analysis' unit order."""

    units: gpd.GeoDataFrame  # geometry + description/district columns, indexed by unit id
    per_unit: pd.DataFrame  # analysis.per_unit
    codes: tuple[str, ...]  # condition codes present, map order
    labels: dict[str, str]  # code -> label
    counts: dict[str, int]  # code -> number of units
    bands: tuple[float, ...]  # outer band distances, metres
    rows: tuple[tuple[str, object, object], ...]  # (code, ContrastEstimate, Verdict)
    description_column: str | None
    district_column: str | None
    title: str
    subtitle: str
    metres_per_unit: float

    @property
    def change(self) -> np.ndarray:
        return self.per_unit["change"].to_numpy(dtype=float)


def _gather(analysis: Analysis, trial: TrialFile | str | os.PathLike) -> _ResultData:
    from geoexp.trialfile import TrialFile

    tf = trial if isinstance(trial, TrialFile) else TrialFile.open(trial)
    where = f"trial file {str(tf.path)!r}"
    if tf.spec_hash and analysis.spec_hash and tf.spec_hash != analysis.spec_hash:
        raise InputError(
            f"the analysis is of design {analysis.spec_hash[:12]} but {where} holds design "
            f"{tf.spec_hash[:12]}; map an analysis with the trial file it was made from"
        )
    per_unit = analysis.per_unit
    needed = {"condition", "condition_label", "pre", "post", "change", "treated", "eligible"}
    missing_cols = sorted(needed - set(per_unit.columns))
    if missing_cols:
        raise InputError(f"the analysis' per-unit table lacks the columns {missing_cols}")
    units = tf.units()
    absent = per_unit.index.difference(units.index)
    if len(absent):
        raise InputError(
            f"{where}: {len(absent)} units of the analysis are not in its 'units' layer: "
            f"ids {describe_rows(absent)}"
        )
    units = units.loc[per_unit.index]
    empty = units.geometry.isna() | units.geometry.is_empty
    if empty.any():
        raise GeometryError(
            f"{where}, layer 'units', column {units.geometry.name!r}: {int(empty.sum())} units "
            f"have no geometry and cannot be mapped: ids {describe_rows(units.index[empty])}"
        )
    spec = tf.spec()
    codes = tuple(condition_order(per_unit["condition"].astype(str).unique()))
    labels = (
        per_unit.drop_duplicates("condition")
        .set_index("condition")["condition_label"]
        .astype(str)
        .to_dict()
    )
    counts = per_unit["condition"].value_counts()
    # Each contrast names its exposure by the condition label; match them up.
    by_label = {labels[c]: c for c in codes}
    rows = []
    for effect, verdict in zip(analysis.effects, analysis.verdicts, strict=True):
        code = by_label.get(effect.exposure)
        if code is not None:
            rows.append((code, effect, verdict))
    bands = tuple(float(b) for b in (analysis.band_edges or spec.exposure.bands_m))
    level = int(round(100 * analysis.level))
    subtitle = (
        f"design {analysis.spec_hash[:12]} · outcome: {analysis.outcome_words} · "
        f"{analysis.estimator} estimates vs pure control with {level}% intervals"
    )
    return _ResultData(
        units=units,
        per_unit=per_unit,
        codes=codes,
        labels=labels,
        counts={c: int(counts.get(c, 0)) for c in codes},
        bands=bands,
        rows=tuple(rows),
        description_column=spec.field.description_column,
        district_column=spec.field.district_column,
        title=str(tf.meta.get("name") or analysis.name),
        subtitle=subtitle,
        metres_per_unit=_metres_per_unit(units),
    )


def change_limit(change: np.ndarray) -> float:
    """Where the change colour scale saturates: a whole number, at least 1.

    The 95th percentile of the absolute change, rounded up, so that units
    beyond it take the end colours and the scale says "or more".
    """
    finite = np.abs(change[np.isfinite(change)])
    if finite.size == 0:
        return 1.0
    return float(max(1.0, np.ceil(np.quantile(finite, SATURATION_QUANTILE))))


def _change_colours(change: np.ndarray, limit: float) -> np.ndarray:
    """Hex colour per unit; units with no change value get the grey of "never"."""
    from matplotlib import colormaps

    rgba = colormaps[CHANGE_CMAP]((np.clip(change, -limit, limit) + limit) / (2 * limit))
    rgb = np.round(rgba[:, :3] * 255).astype(np.int64)
    hexes = np.char.add("#", np.char.zfill(np.char.mod("%06x", rgb @ [65536, 256, 1]), 6))
    return np.where(np.isfinite(change), hexes, NEVER_COLOUR).astype(object)


def _effect_words(effect) -> str:
    return f"{effect.estimate:+.2f} ({effect.ci_low:+.2f} to {effect.ci_high:+.2f})"


def _treated_rings(data: _ResultData) -> np.ndarray | None:
    treated = data.units.geometry[data.per_unit["treated"].astype(bool).to_numpy()]
    if len(treated) == 0 or not data.bands:
        return None
    return _rings(treated, data.bands)


# ---------------------------------------------------------------- static map


def _parts(geoms: np.ndarray) -> tuple[list[np.ndarray], np.ndarray, bool]:
    """Coordinate arrays to draw and the unit each belongs to; polygons by their outer rings."""
    parts, owner = shapely.get_parts(geoms, return_index=True)
    kinds = set(np.unique(shapely.get_type_id(parts)).tolist())
    if kinds <= {1, 2}:
        polygonal = False
    elif kinds <= {3}:
        polygonal = True
        parts = shapely.get_exterior_ring(parts)
    else:
        raise GeometryError(
            "result maps draw line units (street segments) or polygon units (parcels), not a mix "
            "and not points"
        )
    coords, index = shapely.get_coordinates(parts, return_index=True)
    return np.split(coords, np.flatnonzero(np.diff(index)) + 1), owner, polygonal


def _scaled_dashes(dash: tuple[float, ...], width: float):
    # matplotlib multiplies dash lengths by the line width; divide so the
    # pattern in points is the same for a line and its wider casing.
    return "solid" if not dash else (0.0, tuple(d / width for d in dash))


def result_map_static(
    analysis: Analysis,
    trial: TrialFile | str | os.PathLike,
    ax: Axes | None = None,
    districts: str | os.PathLike | gpd.GeoDataFrame | None = None,
) -> Axes:
    """Draw the map of the observed change per unit by condition, with the verdict.

    Each unit is coloured by its observed change, post-period minus
    pre-period count, on the diverging RdBu scale of ColorBrewer (Harrower &
    Brewer, 2003) centred on no change and saturating at the 95th percentile
    of the absolute change (see the colour bar). The conditions differ by
    line width and dash pattern (:func:`~geoexp.maps.condition_style`), with a
    dark casing under every line and a black one under treated units, so they
    read in grey and the pale "no change" shows on any background. The
    spillover bands are translucent rings at the design's band distances
    around the treated units (straight-line distance). A legend with the
    estimate and interval of each condition against the pure controls, a
    scale bar, a north arrow, a colour bar, and a caption with the verdict
    sentences complete the map.

    Parameters
    ----------
    analysis : Analysis
        The result of :func:`geoexp.analysis.analyse`.
    trial : TrialFile or path
        The trial file the analysis was made from (for the unit geometry).
    ax : matplotlib Axes, optional
        Where to draw; a new figure of about A4 width when omitted. A colour
        bar is added beside it and the caption below it.
    districts : path or GeoDataFrame, optional
        District polygons. By default the sample city's districts for the
        sample city, else outlines around each district's units (from the
        design spec's ``district_column``), else none.

    Returns
    -------
    matplotlib.axes.Axes
        The map. Its unit collections have the ``gid`` ``"units:<code>"``
        (casings ``"casing:<code>"``), one path per line or polygon part; the
        rings have ``"ring:<k>"``.

    Raises
    ------
    InputError
        If the analysis does not belong to the trial file.
    GeometryError
        If units have no geometry, or are points.
    """
    import matplotlib.pyplot as plt
    from matplotlib.cm import ScalarMappable
    from matplotlib.collections import LineCollection, PolyCollection
    from matplotlib.colors import Normalize, to_rgba
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    from geoexp.briefing._mapdecor import halo_text, scale_bar_and_north_arrow

    data = _gather(analysis, trial)
    if ax is None:
        _, ax = plt.subplots(figsize=(8.3, 8.3))
    fig = ax.figure
    units = data.units
    x0, y0, x1, y1 = units.total_bounds
    pad = 0.03 * max(x1 - x0, y1 - y0, 1.0)
    ax.set_xlim(x0 - pad, x1 + pad)
    ax.set_ylim(y0 - pad, y1 + pad)
    ax.set_aspect("equal", adjustable="box")
    ax.set_xticks([])
    ax.set_yticks([])
    ax.set_facecolor(MAP_BACKGROUND)

    handles: list = []
    dist_frame, how = _districts_layer(
        districts, units, data.district_column, _is_sample_city(units)
    )
    if dist_frame is not None and len(dist_frame):
        outline = dist_frame.geometry.boundary
        outline.plot(ax=ax, color="0.3", linewidth=0.8, linestyle=(0, (8, 3, 2, 3)), zorder=1)
        ax.collections[-1].set_gid("districts")
        label_at = shapely.get_coordinates(
            shapely.point_on_surface(np.asarray(dist_frame.geometry.array, dtype=object))
        )
        for name, (lx, ly) in zip(dist_frame["name"], label_at, strict=True):
            halo_text(
                ax,
                lx,
                ly,
                str(name),
                ha="center",
                va="center",
                fontsize=7.5,
                fontweight="bold",
                color="0.2",
                zorder=20,
            )
        handles.append(
            Line2D([], [], color="0.3", linewidth=0.8, linestyle=(0, (8, 3, 2, 3)), label=how)
        )

    rings = _treated_rings(data)
    if rings is not None:
        for k, (ring, label) in enumerate(zip(rings, _ring_labels(data.bands), strict=True)):
            colour = condition_style(f"spillover_{k + 1}").colour
            gpd.GeoSeries([ring], crs=units.crs).plot(
                ax=ax,
                facecolor=to_rgba(colour, RING_FILL_OPACITY),
                edgecolor=to_rgba(colour, 0.9),
                linewidth=0.6,
                linestyle="--",
                zorder=2,
            )
            ax.collections[-1].set_gid(f"ring:{k + 1}")
            handles.append(
                Patch(
                    facecolor=to_rgba(colour, RING_FILL_OPACITY + 0.1),
                    edgecolor=colour,
                    linestyle="--",
                    label=label,
                )
            )

    limit = change_limit(data.change)
    colours = _change_colours(data.change, limit)
    conditions = data.per_unit["condition"].astype(str).to_numpy()
    geoms = np.asarray(units.geometry.array, dtype=object)
    estimates = {code: effect for code, effect, _ in data.rows}
    # Pure controls first and treated last, so treated units sit on top.
    for depth, code in enumerate(reversed(data.codes)):
        members = np.flatnonzero(conditions == code)
        paths, owner, polygonal = _parts(geoms[members])
        style = condition_style(code)
        width = style.width * PRINT_WIDTH
        casing_width = width + (1.6 if code == "treated" else 0.9)
        casing_colour = TREATED_CASING if code == "treated" else CASING_COLOUR
        z = 3 + depth
        part_colours = colours[members][owner].tolist()
        if polygonal:
            # Parcels: fill with the change, outline in the condition's width and dash.
            coll = PolyCollection(
                paths,
                facecolors=part_colours,
                edgecolors=casing_colour,
                linewidths=max(0.4, width / 2),
                linestyles=_scaled_dashes(style.dash, max(0.4, width / 2)),
                zorder=z,
            )
            coll.set_gid(f"units:{code}")
            ax.add_collection(coll)
        else:
            casing = LineCollection(
                paths,
                colors=casing_colour,
                linewidths=casing_width,
                linestyles=_scaled_dashes(style.dash, casing_width),
                capstyle="butt",
                zorder=z,
            )
            casing.set_gid(f"casing:{code}")
            ax.add_collection(casing)
            coll = LineCollection(
                paths,
                colors=part_colours,
                linewidths=width,
                linestyles=_scaled_dashes(style.dash, width),
                capstyle="butt",
                zorder=z + 0.5,
            )
            coll.set_gid(f"units:{code}")
            ax.add_collection(coll)
    condition_handles = []
    for code in data.codes:
        style = condition_style(code)
        text = f"{data.labels[code]} ({data.counts[code]:,})"
        if code in estimates:
            text += f": {_effect_words(estimates[code])}"
        condition_handles.append(_legend_line(style.width * PRINT_WIDTH, style.dash, text))
    # Legend and caption go under the map, so that they hide no units.
    legend = ax.legend(
        handles=condition_handles + handles,
        loc="upper left",
        bbox_to_anchor=(0.0, -0.012),
        ncols=2,
        fontsize=7,
        framealpha=1.0,
        edgecolor="0.5",
        title="condition (units): estimate vs pure control (interval)",
        title_fontsize=7,
        alignment="left",
        borderaxespad=0.0,
    )
    legend.set_gid("legend")

    clipped = bool(np.nanmax(np.abs(data.change), initial=0.0) > limit)
    colourbar = fig.colorbar(
        ScalarMappable(norm=Normalize(-limit, limit), cmap=CHANGE_CMAP),
        ax=ax,
        shrink=0.55,
        pad=0.02,
        extend="both" if clipped else "neither",
    )
    colourbar.set_label("observed change per unit, post − pre (incidents)", fontsize=8)
    colourbar.ax.tick_params(labelsize=7)

    scale_bar_and_north_arrow(
        ax, crs=units.crs, metres_per_unit=data.metres_per_unit, bounds=units.total_bounds
    )
    ax.set_title(
        f"{data.title}: observed change per unit\n"
        + textwrap.fill(
            data.subtitle, max(60, int(ax.get_position().width * fig.get_figwidth() * 72 / 4))
        ),
        fontsize=8.5,
    )

    ax.set_xlabel("")
    ax.set_ylabel("")
    width_in = ax.get_position().width * fig.get_figwidth()
    chars = max(50, int(width_in * 72 / (7.0 * 0.5)))
    sentences = [v.sentence for v in analysis.verdicts]
    # No breaks at hyphens: "0-150 m" and "-6.40" must stay whole.
    caption = "\n".join(
        textwrap.fill(s, chars, subsequent_indent="  ", break_on_hyphens=False) for s in sentences
    )
    ax.annotate(
        caption,
        xy=(0.0, 0.0),
        xycoords=legend,
        xytext=(0.0, -8.0),
        textcoords="offset points",
        ha="left",
        va="top",
        fontsize=7.0,
        linespacing=1.3,
        gid="verdicts",
        annotation_clip=False,
        bbox={"boxstyle": "round,pad=0.5", "facecolor": "white", "edgecolor": "0.5", "lw": 0.6},
    )
    return ax


def _legend_line(width: float, dash: tuple[float, ...], label: str):
    from matplotlib.lines import Line2D

    line = Line2D(
        [],
        [],
        color="0.35",
        linewidth=width,
        linestyle=_scaled_dashes(dash, width),
        solid_capstyle="butt",
        dash_capstyle="butt",
        label=label,
    )
    return line


# ----------------------------------------------------------- interactive map


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
        ``"auto"`` (OpenStreetMap for real places; a plain background for the
        invented sample city, which lies in the open ocean), None for a plain
        background, or any tile name or URL template folium accepts.
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
    data = _gather(analysis, trial)
    units = data.units
    per_unit = data.per_unit
    page = _Page(units, tiles, data.title)
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
    page.datasets["units"] = _unit_dataset(
        units,
        data.description_column,
        data.district_column,
        extra,
        {"labels": labels, "prob_labels": [labels[c] for c in prob_codes]},
    )
    limit = change_limit(data.change)
    palette, colour_of = np.unique(
        _change_colours(data.change, limit).astype(str), return_inverse=True
    )
    values = {
        "id": per_unit.index.astype(str).tolist(),
        "pre": _numbers(per_unit["pre"]),
        "post": _numbers(per_unit["post"]),
        "change": _numbers(per_unit["change"]),
        "colour": colour_of.astype(int).tolist(),
        "palette": palette.tolist(),
    }

    dist_frame, how = _districts_layer(districts, units, data.district_column, page.sample)
    _add_districts(page, dist_frame, how)

    rings = _treated_rings(data)
    if rings is not None:
        group = page.group(
            "Spillover bands: " + ", ".join(f"{b:g}" for b in data.bands) + " m", True
        )
        _add_rings(
            page,
            group,
            rings,
            _ring_labels(data.bands),
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
    return _finish(page, data, analysis, values, limit)


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
    low, high = (f"≤ {-limit:g}", f"≥ +{limit:g}") if clipped else (f"{-limit:g}", f"+{limit:g}")
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


def _estimates_html(data: _ResultData, analysis: Analysis) -> str:
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


def _finish(page: _Page, data: _ResultData, analysis: Analysis, values: dict, limit: float):
    folium = page.folium
    folium.LayerControl(collapsed=False, position="topright").add_to(page.map)
    clipped = bool(np.nanmax(np.abs(data.change), initial=0.0) > limit)
    rows = []
    for code in data.codes:
        s = condition_style(code)
        rows.append(
            _legend_row(
                _line_sample("#777777", s.width, s.dash_array),
                f"{data.labels[code]} ({data.counts[code]:,})",
            )
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
    _result_script(page, values, legend).add_to(page.map)
    return page.map


def _result_script(page: _Page, values: dict, legend_html: str):
    """The result page's own element (built lazily so folium loads only when a map is made)."""
    cfg = {"layers": page.layers, "background": MAP_BACKGROUND if page.tiles is None else None}
    return _script_element(
        "GeoexpResults",
        _RESULT_TEMPLATE,
        cfg,
        page.datasets,
        {lay["group"] for lay in page.layers},
        legend_html,
        values=values,
    )


# The result page's script: the shared parts of the planning page's script
# with tooltips that give each unit's pre, post and change, and unit lines
# coloured by the change.
_RESULT_TEMPLATE = (
    """
{% macro header(this, kwargs) %}
<style>
.geoexp-legend { background: rgba(255,255,255,0.95); padding: 8px 10px; border-radius: 4px;
  box-shadow: 0 1px 4px rgba(0,0,0,0.35); font: 12px/1.35 system-ui, sans-serif; color: #111;
  max-width: 340px; max-height: calc(100vh - 240px); overflow-y: auto; }
.geoexp-legend td, .geoexp-legend th { padding: 1px 4px 1px 0; vertical-align: middle; }
.geoexp-legend th { text-align: left; font-weight: 600; }
.geoexp-legend .geoexp-est td { text-align: right; white-space: nowrap; }
.geoexp-legend .geoexp-est td:first-child { text-align: left; white-space: normal; }
.geoexp-legend .geoexp-section { font-weight: 600; margin-top: 6px; }
.geoexp-legend ul { margin: 2px 0 0 0; padding-left: 16px; }
.geoexp-ramp { height: 10px; border: 1px solid #555; margin: 2px 0 0 0; }
.geoexp-ramp-labels { display: flex; justify-content: space-between; font-size: 11px;
  margin-bottom: 4px; }
.geoexp-tip { font: 12px/1.35 system-ui, sans-serif; border-collapse: collapse; }"""
    + _SHARED_CSS
    + """</style>
<script type="application/json" id="geoexp-result-values">{{ this.values }}</script>
{% endmacro %}
{% macro script(this, kwargs) %}"""
    + _SCRIPT_OPEN
    + """  var values = JSON.parse(document.getElementById("geoexp-result-values").textContent);
  function num(v) { return (v === null || v === undefined) ? "n/a" : String(v); }
  function signed(v) {
    if (v === null || v === undefined) return "n/a";
    return (v > 0 ? "+" : "") + String(v);
  }
  function unitTip(meta) {
    return function (layer) {
      var p = layer.feature.properties, i = p.i, rows = [["unit", p.id]];
      if (p.d !== undefined) rows.push(["street", p.d]);
      if (p.ds !== undefined) rows.push(["district", p.ds]);
      rows.push(["condition", meta.labels[p.c] || p.c]);
      rows.push(["pre", num(values.pre[i])]);
      rows.push(["post", num(values.post[i])]);
      rows.push(["change", signed(values.change[i])]);
      if (p.p) { for (var j = 0; j < p.p.length; j++) rows.push(["P(" + meta.prob_labels[j] + ")", fmt(p.p[j])]); }
      return '<table class="geoexp-tip">' + rows.map(function (r) {
        return "<tr><td><b>" + esc(r[0]) + "</b></td><td>" + esc(r[1]) + "</td></tr>"; }).join("") + "</table>";
    };
  }
  function layerStyle(lay) {
    if (!lay.coloured) return function () { return lay.style; };
    return function (f) {
      var out = Object.assign({}, lay.style);
      out.color = values.palette[values.colour[f.properties.i]];
      return out;
    };
  }"""
    + _SCRIPT_EXPAND
    + """  var handle = {map: map, layers: {}, groups: {}, expected: {}, legend: null, values: values};"""
    + _SCRIPT_LAYERS
    + _SCRIPT_CLOSE
)


def save_result_map(
    analysis: Analysis,
    trial: TrialFile | str | os.PathLike,
    path: str | os.PathLike,
    *,
    tiles: str | None = "auto",
) -> Path:
    """Make :func:`result_map` and write it with :func:`~geoexp.maps.save_map`; return the path."""
    from geoexp.maps._planning import save_map

    return save_map(result_map(analysis, trial, tiles=tiles), Path(path))


__all__ = ["change_limit", "result_map", "result_map_static", "save_result_map"]
