"""The page framework shared by every interactive map: layers, legend, page script, saving.

A :class:`Page` collects the datasets and layer declarations of one folium map;
:func:`page_element` adds the page's own element, rendered from the template
files in ``geoexp/maps/assets`` (styles in ``.css`` files, the page script in
``.js`` files), and :func:`save_map` writes the page with Leaflet inlined.
"""

from __future__ import annotations

import functools
import html
import json
import os
from collections.abc import Sequence
from pathlib import Path

import geopandas as gpd
import numpy as np
import shapely

from geoexp._atomic import atomic_path
from geoexp.maps._assets import inline_assets, warn_if_remote
from geoexp.maps._geometry import metres_per_unit
from geoexp.maps._palette import condition_style
from geoexp.maps._web import (
    DECIMALS,
    WGS84,
    dump,
    feature_collection,
    refuse_planar,
    script_safe,
    to_web,
)

ZONES_FILENAME = "exclusion_zones.geojson"
PLAIN_BACKGROUND = "#f3f1ec"
DEFAULT_TILES = "OpenStreetMap"

# Sequential colours for probabilities: matplotlib's viridis (van der Walt &
# Smith, 2015), perceptually uniform and monotone in lightness, so the classes
# also order correctly in grey and for colour-blind readers.
PROB_BINS = 5
NEVER_COLOUR = "#9a9a9a"
DRAW_NOTE = (
    "Draw polygons or rectangles with the tools on the left, then 'Save zones' to write "
    f"{ZONES_FILENAME}; list it under [eligible] exclude in the design spec."
)


def _folium():
    import folium  # a core dependency, imported late to keep `import geoexp` light

    return folium


def prob_colours(n: int = PROB_BINS) -> list[str]:
    """The probability classes' colours (viridis), ``n`` of them."""
    from matplotlib import colormaps
    from matplotlib.colors import to_hex

    cmap = colormaps["viridis"]
    return [to_hex(cmap(x)) for x in np.linspace(0.0, 0.92, n)]


def prob_breaks(values: np.ndarray, n_classes: int = PROB_BINS) -> list[float]:
    """Class bounds fitted to the data: quantiles of the positive probabilities, rounded to 0.001.

    Quantile classes (equal counts per class; Slocum et al. 2009 [from memory]) spread the
    colours over the range the units really have, so a narrow range such as 0.14 to 0.35
    still shows five colours. Returns the bounds from the smallest to the largest value
    (``n + 1`` numbers, fewer when values repeat); an empty list when no value is positive.
    """
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v) & (v > 0)]
    if v.size == 0:
        return []
    q = np.quantile(v, np.linspace(0, 1, n_classes + 1))
    edges = np.unique(np.round(q, 3))
    edges[0] = min(edges[0], np.floor(v.min() * 1000) / 1000)
    edges[-1] = max(edges[-1], np.ceil(v.max() * 1000) / 1000)
    if edges.size == 1:
        edges = np.array([edges[0], edges[0]])
    return [float(e) for e in edges]


# SVG fill patterns of the spillover bands (band 1 lines, band 2 dots, then cross-hatch and
# horizontal lines), so that bands differ by texture as well as hue and survive greyscale.
_HATCHES = (
    ("lines", '<path d="M0 8 L8 0" stroke="{c}" stroke-width="1.6"/>'),
    ("dots", '<circle cx="4" cy="4" r="1.6" fill="{c}"/>'),
    ("cross", '<path d="M0 8 L8 0 M0 0 L8 8" stroke="{c}" stroke-width="1"/>'),
    ("rows", '<path d="M0 4 L8 4" stroke="{c}" stroke-width="1.4"/>'),
)


def band_hatch(k: int, colour: str, pattern_id: str = "__ID__") -> dict:
    """The fill pattern of spillover band ``k`` (1-based): its name and SVG ``<pattern>``."""
    name, shape = _HATCHES[min(k, len(_HATCHES)) - 1]
    svg = (
        f'<pattern id="{pattern_id}" width="8" height="8" patternUnits="userSpaceOnUse">'
        + shape.format(c=colour)
        + "</pattern>"
    )
    return {"name": f"{name}-{k}", "svg": svg}


class Page:
    """Collects the data and layer declarations of one map, then writes the folium map.

    ``tiles``: ``"auto"`` (OpenStreetMap), None for a plain background, or any
    tile name or URL template folium accepts.
    """

    def __init__(self, frame: gpd.GeoDataFrame, tiles: str | None, title: str):
        refuse_planar(frame.crs)
        folium = _folium()
        self.folium = folium
        self.frame = frame
        self.title = title
        if tiles == "auto":
            tiles = DEFAULT_TILES
        self.tiles = tiles
        web_bounds = (
            gpd.GeoSeries([shapely.box(*frame.total_bounds)], crs=frame.crs)
            .to_crs(WGS84)
            .total_bounds
        )
        self.map = folium.Map(
            tiles=tiles,
            control_scale=True,
            prefer_canvas=False,
            zoom_control=True,
            max_zoom=20,
        )
        self.map.fit_bounds([[web_bounds[1], web_bounds[0]], [web_bounds[3], web_bounds[2]]])
        self.layers: list[dict] = []  # declarations for the page script
        self.legend: list[str] = []
        self.datasets: dict[str, dict] = {}

    @property
    def background(self) -> str | None:
        """The plain background colour when there are no tiles."""
        return PLAIN_BACKGROUND if self.tiles is None else None

    def group(self, name: str, show: bool = True):
        fg = self.folium.FeatureGroup(name=name, show=show, control=True)
        fg.add_to(self.map)
        return fg

    def declare(self, key: str, label: str, dataset: str, show: bool, expected: int, **spec):
        fg = self.group(f"{label} ({expected:,})" if expected >= 0 else label, show)
        self.layers.append(
            {"key": key, "group": fg.get_name(), "data": dataset, "expected": expected, **spec}
        )
        return fg


@functools.cache
def _templates():
    import jinja2

    return jinja2.Environment(
        loader=jinja2.PackageLoader("geoexp.maps", "assets"), keep_trailing_newline=True
    )


def page_element(
    page: Page,
    template: str,
    cfg: dict,
    legend_html: str,
    *,
    name: str = "GeoexpPage",
    extra_groups: Sequence[str] = (),
    values: dict | None = None,
):
    """Add the page's own element, rendered from the template file ``assets/<template>``.

    The element carries the layer declarations (``cfg``), the datasets, the
    feature-group names the script looks up, the legend's HTML and, for the
    result page, the per-unit values. Built lazily, so folium loads only when a
    map is made.
    """
    from branca.element import MacroElement

    class PageScript(MacroElement):
        _template = _templates().get_template(template)

        def __init__(self):
            super().__init__()
            self._name = name
            self.config = script_safe(json.dumps(cfg, separators=(",", ":")))
            self.datasets = script_safe(dump(page.datasets))
            self.values = script_safe(json.dumps(values, separators=(",", ":")))
            self.groups = sorted({lay["group"] for lay in page.layers} | set(extra_groups))
            self.legend_html = script_safe(json.dumps(legend_html))

    element = PageScript()
    element.add_to(page.map)
    return element


def finish_drawable(page: Page, draw_group, notes: Sequence[str], caution: str):
    """Finish a page that has the drawing tool for exclusion zones (planning and drawing maps)."""
    from folium.plugins import Draw

    shape = {"color": "#000000", "weight": 2, "dashArray": "6 4", "fillOpacity": 0.15}
    Draw(
        export=False,
        feature_group=draw_group,
        position="topleft",
        show_geometry_on_click=False,
        draw_options={
            "polyline": False,
            "circle": False,
            "circlemarker": False,
            "marker": False,
            # Area readouts are off: Leaflet.draw 1.0's area label fails for rectangles.
            "polygon": {"allowIntersection": False, "showArea": False, "shapeOptions": shape},
            "rectangle": {"showArea": False, "shapeOptions": shape},
        },
        edit_options={"poly": {"allowIntersection": False}},
    ).add_to(page.map)
    page.folium.LayerControl(collapsed=False, position="topright").add_to(page.map)
    cfg = {
        "layers": page.layers,
        "prob_colours": prob_colours(),
        "never_colour": NEVER_COLOUR,
        "background": page.background,
        "draw_group": draw_group.get_name(),
        "zones_filename": ZONES_FILENAME,
    }
    page_element(
        page,
        "planning_page.html.j2",
        cfg,
        legend_html(page.title, page.legend, notes, caution),
        extra_groups=[draw_group.get_name()],
    )
    return page.map


def line_sample(colour: str, width: float, dash: str | None, opacity: float = 1.0) -> str:
    dash_attr = f' stroke-dasharray="{dash}"' if dash else ""
    return (
        f'<svg width="44" height="14" aria-hidden="true"><line x1="2" y1="7" x2="42" y2="7" '
        f'stroke="{colour}" stroke-width="{width:g}" stroke-opacity="{opacity:g}"{dash_attr}/></svg>'
    )


def fill_sample(
    colour: str, opacity: float, stroke: str | None = None, hatch: int | None = None
) -> str:
    """A legend swatch; ``hatch`` (band number) fills it with that band's pattern."""
    line = f' stroke="{stroke}" stroke-width="1.5"' if stroke else ""
    defs, fill = "", colour
    if hatch is not None:
        pid = f"geoexp-legend-hatch-{hatch}"
        defs = "<defs>" + band_hatch(hatch, colour, pid)["svg"] + "</defs>"
        fill, opacity = f"url(#{pid})", 1.0
    return (
        f'<svg width="44" height="14" aria-hidden="true">{defs}<rect x="2" y="1" width="40" '
        f'height="12" fill="{fill}" fill-opacity="{opacity:g}"{line}/></svg>'
    )


def legend_html(title: str, rows: list[str], notes: Sequence[str], caution: str) -> str:
    parts = [f"<h4>{html.escape(title)}</h4>"]
    parts += [f'<div class="sub">{html.escape(n)}</div>' for n in notes[:1]]
    parts.append("<table>" + "".join(rows) + "</table>")
    parts += [f'<div class="note">{html.escape(n)}</div>' for n in notes[1:]]
    parts.append(f'<div class="caution">{html.escape(caution)}</div>')
    return "".join(parts)


def legend_row(sample: str, label: str) -> str:
    return f"<tr><td>{sample}</td><td>{html.escape(label)}</td></tr>"


def style_js(code: str) -> dict:
    s = condition_style(code)
    out = {"color": s.colour, "weight": s.width, "opacity": s.opacity, "lineCap": "butt"}
    if s.dash_array:
        out["dashArray"] = s.dash_array
    return out


def add_districts(page: Page, districts: gpd.GeoDataFrame | None, how: str) -> None:
    if districts is None or len(districts) == 0:
        return
    geoms = to_web(districts.geometry, 2.0 / metres_per_unit(districts))
    label_at = shapely.get_coordinates(
        shapely.point_on_surface(np.asarray(districts.geometry.to_crs(WGS84).array, dtype=object))
    ).round(DECIMALS)
    props = [
        {"name": n, "label_at": [float(x), float(y)]}
        for n, (x, y) in zip(districts["name"], label_at, strict=True)
    ]
    page.datasets["districts"] = {"data": feature_collection(geoms, props), "meta": {}}
    style = {
        "color": "#4d4d4d",
        "weight": 1.5,
        "opacity": 0.9,
        "fill": False,
        "dashArray": "12 4 2 4",
    }
    page.declare(
        "districts",
        "Districts",
        "districts",
        True,
        len(districts),
        kind="plain",
        style=style,
        tip="none",
        labels=True,
    )
    page.legend.append(legend_row(line_sample("#4d4d4d", 1.5, "12 4 2 4"), f"District ({how})"))


def add_rings(
    page: Page,
    group,
    rings: np.ndarray,
    labels: Sequence[str],
    *,
    fill_opacity: float,
    sample_opacity: float,
) -> None:
    """One switchable layer per band ring, in the band's colour, all in one group.

    Each ring is its own dataset and layer, so the browser can style and
    count it on its own; each band is filled with its own pattern (lines,
    dots, ...) as well as its colour, so bands differ in grey; the legend gets
    one patterned sample per ring.
    """
    web = to_web(gpd.GeoSeries(rings, crs=page.frame.crs), 1.0 / metres_per_unit(page.frame))
    for k, label in enumerate(labels):
        s = condition_style(f"spillover_{k + 1}")
        page.datasets[f"ring_{k + 1}"] = {
            "data": feature_collection(web[k : k + 1], [{"name": label}]),
            "meta": {},
        }
        page.layers.append(
            {
                "key": f"ring:{k + 1}",
                "group": group.get_name(),
                "data": f"ring_{k + 1}",
                "expected": 1,
                "kind": "plain",
                "tip": "name",
                "hatch": band_hatch(k + 1, s.colour),
                "style": {
                    "color": s.colour,
                    "weight": 1,
                    "opacity": 0.8,
                    "fillColor": s.colour,
                    # the pattern is mostly empty: a stronger opacity keeps it as light as a tint
                    "fillOpacity": min(1.0, 3 * fill_opacity),
                    "dashArray": "3 3",
                },
            }
        )
        page.legend.append(
            legend_row(fill_sample(s.colour, sample_opacity, s.colour, hatch=k + 1), label)
        )


def add_eligible(page: Page, n_eligible: int) -> None:
    """The eligible units as a broad halo under the unit lines, with its legend row."""
    page.declare(
        "eligible",
        "Eligible units",
        "units",
        True,
        n_eligible,
        kind="eligible",
        style=style_js("eligible"),
        tip="unit",
    )
    halo = condition_style("eligible")
    page.legend.append(
        legend_row(
            line_sample(halo.colour, halo.width, None, halo.opacity), f"eligible ({n_eligible:,})"
        )
    )


def map_html(m) -> tuple[str, list[str]]:
    """Render a folium map to a page with its scripts inlined; also return remaining remote URLs.

    Parameters
    ----------
    m : folium.Map
        The map.

    Returns
    -------
    html : str
        The page, with Leaflet and Leaflet.draw inlined when the shipped copies
        are found (see :func:`inline_assets`).
    remote : list of str
        Script and style URLs the page still loads from the network (empty when
        it is self-contained).
    """
    return inline_assets(m.get_root().render())


def save_map(m, path: str | os.PathLike) -> Path:
    """Write a map as one self-contained HTML page, atomically.

    Leaflet and Leaflet.draw are inlined from the copies shipped with geoexp,
    their stylesheet images become ``data:`` URIs, and folium's unused links
    (jQuery, Bootstrap, icon fonts) are dropped, so the page needs no network
    apart from base-map tiles. If the shipped copies are missing, the page
    keeps content-network links and an ``OfflineAssetWarning`` says so.

    Parameters
    ----------
    m : folium.Map
        A map from :func:`planning_map` or :func:`drawing_map` (or any folium map).
    path : path
        The HTML file to write.

    Returns
    -------
    pathlib.Path
    """
    path = Path(path)
    page, remote = map_html(m)
    warn_if_remote(remote, f"the map {str(path)!r}")
    with atomic_path(path) as tmp:
        tmp.write_text(page, encoding="utf-8")
    return path
