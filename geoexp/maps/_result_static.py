"""The static result map (matplotlib): observed change per unit by condition, with the verdict."""

from __future__ import annotations

import os
import textwrap
from typing import TYPE_CHECKING

import geopandas as gpd
import numpy as np
import shapely

from geoexp.errors import GeometryError
from geoexp.maps._geometry import district_outlines, ring_labels
from geoexp.maps._palette import condition_style
from geoexp.maps._result_data import (
    CASING_COLOUR,
    CHANGE_CMAP,
    MAP_BACKGROUND,
    RING_FILL_OPACITY,
    TREATED_CASING,
    change_colours,
    change_limit,
    effect_words,
    gather,
    treated_rings,
)
from geoexp.maps._static import (
    PRINT_RC,
    PRINT_WIDTH,
    draw_district_outlines,
    halo_text,
    scale_bar_and_north_arrow,
)

if TYPE_CHECKING:
    from matplotlib.axes import Axes

    from geoexp.analysis import Analysis
    from geoexp.trialfile import TrialFile


# Hatching of the spillover bands (band 1, band 2, ...), so that bands differ in grey too.
RING_HATCHES = ("////", "..", "xx", "--")


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
    # slices of one array (what np.split gives, without its per-piece overhead)
    cuts = np.r_[0, np.flatnonzero(np.diff(index)) + 1, len(index)].tolist()
    return [coords[a:b] for a, b in zip(cuts[:-1], cuts[1:], strict=True)], owner, polygonal


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
        District polygons. By default outlines around each district's units
        (from the design spec's ``district_column``), else none; see
        :func:`~geoexp.maps.district_outlines`.

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
    import matplotlib

    # User text (the trial's name, district names) is text, never math.
    with matplotlib.rc_context({"text.parse_math": PRINT_RC["text.parse_math"]}):
        return _draw(analysis, trial, ax, districts)


def _draw(analysis, trial, ax, districts):
    import matplotlib.pyplot as plt
    from matplotlib.cm import ScalarMappable
    from matplotlib.collections import PolyCollection
    from matplotlib.colors import Normalize, to_rgba, to_rgba_array
    from matplotlib.patches import Patch
    from matplotlib.path import Path

    data = gather(analysis, trial)
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
    dist_frame, how = district_outlines(units, data.district_column, districts)
    if dist_frame is not None and len(dist_frame):
        handles.append(draw_district_outlines(ax, dist_frame, label=how))
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

    rings = treated_rings(data)
    if rings is not None:
        for k, (ring, label) in enumerate(zip(rings, ring_labels(data.bands), strict=True)):
            colour = condition_style(f"spillover_{k + 1}").colour
            hatch = RING_HATCHES[min(k, len(RING_HATCHES) - 1)]
            gpd.GeoSeries([ring], crs=units.crs).plot(
                ax=ax,
                facecolor=to_rgba(colour, RING_FILL_OPACITY),
                edgecolor=to_rgba(colour, 0.9),
                linewidth=0.6,
                linestyle="--",
                hatch=hatch,
                zorder=2,
            )
            ax.collections[-1].set_gid(f"ring:{k + 1}")
            handles.append(
                Patch(
                    facecolor=to_rgba(colour, RING_FILL_OPACITY + 0.1),
                    edgecolor=colour,
                    linestyle="--",
                    hatch=hatch,
                    label=label,
                )
            )

    limit = change_limit(data.change)
    # RGBA per unit from the few distinct colours: matplotlib reads a colour name per
    # part otherwise (same colours, one lookup per distinct one)
    names, which = np.unique(change_colours(data.change, limit).astype(str), return_inverse=True)
    colours = to_rgba_array(names)[which.ravel()]
    conditions = data.per_unit["condition"].astype(str).to_numpy()
    geoms = np.asarray(units.geometry.array, dtype=object)
    estimates = {code: (effect, verdict) for code, effect, verdict in data.rows}
    # Pure controls first and treated last, so treated units sit on top.
    for depth, code in enumerate(reversed(data.codes)):
        members = np.flatnonzero(conditions == code)
        paths, owner, polygonal = _parts(geoms[members])
        style = condition_style(code)
        width = style.width * PRINT_WIDTH
        casing_width = width + (1.6 if code == "treated" else 0.9)
        casing_colour = TREATED_CASING if code == "treated" else CASING_COLOUR
        z = 3 + depth
        part_colours = colours[members][owner]
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
            # One Path per part, made once and shared by the casing, the line and the stripe
            # (a LineCollection would make its own from the coordinates each time: at a
            # million units that is most of the map's time).
            paths = [Path(p) for p in paths]
            casing = _lines(
                paths,
                colors=casing_colour,
                linewidths=casing_width,
                linestyles=_scaled_dashes(style.dash, casing_width),
                capstyle="butt",
                zorder=z,
            )
            casing.set_gid(f"casing:{code}")
            ax.add_collection(casing, autolim=False)
            coll = _lines(
                paths,
                colors=part_colours,
                linewidths=width,
                linestyles=_scaled_dashes(style.dash, width),
                capstyle="butt",
                zorder=z + 0.5,
            )
            coll.set_gid(f"units:{code}")
            ax.add_collection(coll, autolim=False)
            # A white centre stripe over units whose count fell: the sign survives greyscale.
            fell = np.flatnonzero(data.change[members][owner] < 0)
            if fell.size:
                stripe = _lines(
                    [paths[i] for i in fell],
                    colors="white",
                    linewidths=max(0.5, 0.35 * width),
                    linestyles=_scaled_dashes(style.dash, max(0.5, 0.35 * width)),
                    capstyle="butt",
                    zorder=z + 0.6,
                )
                stripe.set_gid(f"decrease:{code}")
                ax.add_collection(stripe, autolim=False)
    condition_handles = []
    for code in data.codes:
        style = condition_style(code)
        text = f"{data.labels[code]} ({data.counts[code]:,})"
        if code in estimates:
            text += f": {effect_words(*estimates[code])}"
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
    colourbar.set_label(
        "observed change per unit, post − pre (incidents);\nwhite centre stripe: the count fell",
        fontsize=8,
    )
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


def _lines(paths: list, **style):
    """A LineCollection over ready-made Paths (LineCollection's own setter would copy them)."""
    from matplotlib.collections import Collection, LineCollection

    coll = LineCollection([], **style)
    Collection.set_paths(coll, paths)
    return coll


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
