"""The interactive planning map (folium) and the draw-only map for exclusion zones.

The page embeds the units once, as one GeoJSON collection with short property
names, and builds every switchable layer from it in the browser (conditions,
eligibility halo, probability layers), so the page does not grow with the
number of layers. Geometry is simplified to half a metre in the units' CRS and
rounded to 6 decimals of a degree (about 0.1 m) before embedding.
"""

from __future__ import annotations

import datetime as dt
import html
import json
import os
import re
from collections.abc import Sequence
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import shapely

from geoexp._atomic import atomic_path
from geoexp.errors import CRSError, InputError
from geoexp.maps._assets import inline_assets, warn_if_remote
from geoexp.maps._palette import condition_order, condition_style

WGS84 = "EPSG:4326"
SIMPLIFY_M = 0.5
DECIMALS = 6  # 1e-6 degree is about 0.1 m
ZONES_FILENAME = "exclusion_zones.geojson"
PLAIN_BACKGROUND = "#f3f1ec"

# Sequential colours for probabilities: matplotlib's viridis (van der Walt &
# Smith, 2015), perceptually uniform and monotone in lightness, so the classes
# also order correctly in grey and for colour-blind readers.
PROB_BINS = 5
NEVER_COLOUR = "#9a9a9a"
_DRAW_NOTE = (
    "Draw polygons or rectangles with the tools on the left, then 'Save zones' to write "
    f"{ZONES_FILENAME}; list it under [eligible] exclude in the design spec."
)


def _folium():
    import folium  # a core dependency, imported late to keep `import geoexp` light

    return folium


def _prob_colours() -> list[str]:
    from matplotlib import colormaps
    from matplotlib.colors import to_hex

    cmap = colormaps["viridis"]
    return [to_hex(cmap(x)) for x in np.linspace(0.0, 0.92, PROB_BINS)]


# ---------------------------------------------------------------- geometry prep


def _metres_per_unit(frame: gpd.GeoDataFrame) -> float:
    crs = pyproj.CRS(frame.crs)
    if not crs.is_projected:
        raise CRSError(f"map layers must be in a projected CRS to draw distances; got {crs.name}")
    return float(crs.axis_info[0].unit_conversion_factor)


def _to_web(geoms: gpd.GeoSeries, tolerance: float) -> np.ndarray:
    """Simplify in the projected CRS, then reproject to lon/lat and round to ~0.1 m."""
    arr = np.asarray(geoms.array, dtype=object)
    if tolerance > 0:
        arr = shapely.simplify(arr, tolerance, preserve_topology=True)
    web = gpd.GeoSeries(arr, crs=geoms.crs).to_crs(WGS84)
    return shapely.transform(np.asarray(web.array, dtype=object), lambda xy: np.round(xy, DECIMALS))


def _feature_collection(geoms: np.ndarray, props: list[dict]) -> dict:
    geo = shapely.to_geojson(geoms)
    return {
        "type": "FeatureCollection",
        "features": [
            {"type": "Feature", "properties": p, "geometry": json.loads(g)}
            for p, g in zip(props, geo, strict=True)
        ],
    }


def _records(frame: pd.DataFrame) -> list[dict]:
    return frame.to_dict(orient="records")


def _is_sample_city(frame: gpd.GeoDataFrame) -> gpd.GeoDataFrame | None:
    """The sample city's districts if these units lie in the invented city, else None."""
    if not pyproj.CRS(frame.crs).equals(pyproj.CRS("EPSG:32727")):
        return None
    from geoexp.sampleregion import load_sample_region

    districts = load_sample_region().districts
    x0, y0, x1, y1 = districts.total_bounds
    bx0, by0, bx1, by1 = frame.total_bounds
    margin = 500.0
    if bx0 >= x0 - margin and by0 >= y0 - margin and bx1 <= x1 + margin and by1 <= y1 + margin:
        return districts
    return None


def _read_polygons(source, what: str, target_crs) -> gpd.GeoDataFrame:
    if isinstance(source, gpd.GeoDataFrame):
        frame = source
        label = f"the {what} GeoDataFrame"
    else:
        label = repr(str(source))
        if not Path(source).exists():
            raise InputError(f"{what} file {label} does not exist")
        frame = gpd.read_file(source, engine="pyogrio")
    if frame.crs is None:
        raise CRSError(f"the {what} from {label} have no CRS; geoexp does not guess one")
    kinds = set(frame.geom_type.dropna())
    if not kinds <= {"Polygon", "MultiPolygon"}:
        raise InputError(f"the {what} from {label} must be polygons; found {sorted(kinds)}")
    return frame.to_crs(target_crs)


def _districts_layer(
    districts, frame: gpd.GeoDataFrame, column: str | None, sample: gpd.GeoDataFrame | None
) -> tuple[gpd.GeoDataFrame | None, str]:
    """District polygons and a note on where they came from."""
    if districts is not None:
        out = _read_polygons(districts, "districts", frame.crs)
        name_col = column if column in out.columns else None
        if name_col is None:
            text = [c for c in out.columns if c != out.geometry.name and out[c].dtype == object]
            name_col = text[0] if text else None
        names = (
            out[name_col].astype(str)
            if name_col
            else pd.Series([f"district {i + 1}" for i in range(len(out))], index=out.index)
        )
        return gpd.GeoDataFrame(
            {"name": names.to_numpy()}, geometry=out.geometry.to_numpy(), crs=out.crs
        ), "district boundaries"
    if sample is not None:
        return gpd.GeoDataFrame(
            {"name": sample["district"].astype(str).to_numpy()},
            geometry=sample.geometry.to_numpy(),
            crs=sample.crs,
        ), "district boundaries"
    if column and column in frame.columns:
        # No boundaries given: outline each district around its own units.
        per_metre = _metres_per_unit(frame)
        grown = frame.geometry.buffer(40.0 / per_metre, quad_segs=2)
        dissolved = (
            gpd.GeoDataFrame(
                {"name": frame[column].astype(str).to_numpy()},
                geometry=grown.to_numpy(),
                crs=frame.crs,
            )
            .dissolve(by="name")
            .reset_index()
        )
        return dissolved, "district outlines drawn around their units"
    return None, ""


def _rings(treated: gpd.GeoSeries, bands_m: Sequence[float]) -> np.ndarray:
    """One ring per band: the area within the band's distances of any treated unit."""
    per_metre = _metres_per_unit(gpd.GeoDataFrame(geometry=treated))
    union = shapely.union_all(np.asarray(treated.array, dtype=object))
    outer = [shapely.buffer(union, d / per_metre, quad_segs=6) for d in bands_m]
    inner = [shapely.Polygon()] + outer[:-1]
    return np.array(
        [shapely.difference(o, i) for o, i in zip(outer, inner, strict=True)], dtype=object
    )


def _ring_labels(bands: Sequence[float]) -> list[str]:
    lows = (0.0, *bands[:-1])
    return [f"within {lo:g}-{hi:g} m of a treated unit" for lo, hi in zip(lows, bands, strict=True)]


# ------------------------------------------------------------------ the page


class _Page:
    """Collects the data and layer declarations of one map, then writes the folium map."""

    def __init__(self, frame: gpd.GeoDataFrame, tiles: str | None, title: str):
        folium = _folium()
        self.folium = folium
        self.frame = frame
        self.title = title
        self.sample = _is_sample_city(frame)
        if tiles == "auto":
            tiles = None if self.sample is not None else "OpenStreetMap"
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

    def finish(self, draw_group, notes: Sequence[str], caution: str) -> object:
        folium = self.folium
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
        ).add_to(self.map)
        folium.LayerControl(collapsed=False, position="topright").add_to(self.map)
        script = _page_script(
            datasets=self.datasets,
            layers=self.layers,
            draw_group=draw_group.get_name(),
            legend_html=_legend_html(self.title, self.legend, notes, caution),
            prob_colours=_prob_colours(),
            never_colour=NEVER_COLOUR,
            background=PLAIN_BACKGROUND if self.tiles is None else None,
        )
        script.add_to(self.map)
        return self.map


def _script_safe(text: str) -> str:
    # "</" cannot appear inside an inline script; JSON allows "<\/".
    return text.replace("</", "<\\/")


def _script_element(
    name: str,
    template: str,
    cfg: dict,
    datasets: dict,
    groups: set[str],
    legend_html: str,
    values: dict | None = None,
):
    """A page's own element (built lazily so folium loads only when a map is made).

    The planning and the result pages share this: the layer declarations
    (``cfg``), the datasets, the feature-group names the script looks up, the
    legend's HTML and, for the result page, the per-unit values.
    """
    from branca.element import MacroElement
    from jinja2 import Template

    class PageScript(MacroElement):
        _template = Template(template)

        def __init__(self):
            super().__init__()
            self._name = name
            self.config = _script_safe(json.dumps(cfg, separators=(",", ":")))
            self.datasets = _script_safe(_dump(datasets))
            self.values = _script_safe(json.dumps(values, separators=(",", ":")))
            self.groups = sorted(groups)
            self.legend_html = _script_safe(json.dumps(legend_html))

    return PageScript()


def _page_script(**kw):
    """The planning page's own element."""
    cfg = {k: kw[k] for k in ("layers", "prob_colours", "never_colour", "background")}
    cfg["draw_group"] = kw["draw_group"]
    cfg["zones_filename"] = ZONES_FILENAME
    return _script_element(
        "GeoexpPage",
        _PAGE_TEMPLATE,
        cfg,
        kw["datasets"],
        {lay["group"] for lay in kw["layers"]} | {kw["draw_group"]},
        kw["legend_html"],
    )


# Parts of the page script that the planning and the result pages share. Each
# page defines, between them, its own unitTip(meta) and layerStyle(lay) and a
# `handle` object; layerStyle(lay) returns the Leaflet style of a layer.
#
# Styles every page needs; each page adds its own legend box and extras.
_SHARED_CSS = """
.geoexp-legend h4 { margin: 0 0 2px 0; font-size: 13px; }
.geoexp-legend .sub { color: #444; margin-bottom: 6px; }
.geoexp-legend table { border-collapse: collapse; }
.geoexp-legend .caution { margin-top: 6px; color: #333; font-size: 11px; border-top: 1px solid #bbb;
  padding-top: 4px; }
.geoexp-legend .note { font-size: 11px; color: #333; margin-top: 4px; }
.geoexp-district-label { background: transparent; border: none; box-shadow: none; color: #333;
  font: 600 12px system-ui, sans-serif; text-shadow: 0 0 3px #fff, 0 0 3px #fff; }
.geoexp-tip td { padding: 0 6px 0 0; }
.leaflet-control-layers { font: 12px/1.4 system-ui, sans-serif; }
"""
# The map, the configuration, the data, the feature groups, and the helpers
# for text in tooltips.
_SCRIPT_OPEN = """
(function () {
  var map = {{ this._parent.get_name() }};
  var cfg = {{ this.config }};
  var datasets = {{ this.datasets }};
  var groups = { {% for g in this.groups %}"{{ g }}": {{ g }}{{ "," if not loop.last }}{% endfor %} };
  if (cfg.background) { map.getContainer().style.background = cfg.background; }

  function esc(v) {
    return String(v).replace(/[&<>"']/g, function (c) {
      return {"&": "&amp;", "<": "&lt;", ">": "&gt;", '"': "&quot;", "'": "&#39;"}[c];
    });
  }
  function fmt(p) { return (p === null || p === undefined) ? "n/a" : Number(p).toFixed(3); }
"""
# Expands the compact unit record of _unit_dataset into GeoJSON; `i` is the
# unit's position, which indexes the result page's per-unit values.
_SCRIPT_EXPAND = """
  function expand(u) {
    var ox = u.origin[0], oy = u.origin[1], s = u.scale, feats = [];
    function dec(a) { return typeof a[0] === "number" ? [(a[0] + ox) * s, (a[1] + oy) * s] : a.map(dec); }
    for (var i = 0; i < u.id.length; i++) {
      var p = {id: u.id[i], e: u.e[i], i: i};
      if (u.d) p.d = u.d[i];
      if (u.ds) p.ds = u.dsn[u.ds[i]];
      if (u.c) p.c = u.cn[u.c[i]];
      if (u.p) p.p = u.p[i].map(function (v) { return v === null ? null : v / 1000; });
      feats.push({type: "Feature", properties: p,
                  geometry: {type: typeof u.t === "string" ? u.t : u.t[i], coordinates: dec(u.g[i])}});
    }
    return {type: "FeatureCollection", features: feats};
  }
  Object.keys(datasets).forEach(function (k) {
    if (datasets[k].compact) { datasets[k].data = expand(datasets[k].compact); delete datasets[k].compact; }
  });
"""
# Builds each declared layer from its dataset, then the legend control.
_SCRIPT_LAYERS = """
  cfg.layers.forEach(function (lay) {
    var ds = datasets[lay.data], filter = null;
    if (lay.kind === "condition") {
      filter = function (f) { return f.properties.c === lay.code; };
    } else if (lay.kind === "eligible") {
      filter = function (f) { return f.properties.e === 1; };
    }
    var gj = L.geoJSON(ds.data, {filter: filter, style: layerStyle(lay), interactive: lay.tip !== "none"});
    if (lay.tip === "unit") {
      gj.bindTooltip(unitTip(ds.meta), {sticky: true});
    } else if (lay.tip === "name") {
      gj.eachLayer(function (l) { l.bindTooltip(esc(l.feature.properties.name), {sticky: true}); });
    }
    if (lay.labels) {
      gj.eachLayer(function (l) {
        var pt = l.feature.properties.label_at;
        if (pt) {
          L.tooltip({permanent: true, direction: "center", className: "geoexp-district-label",
                     interactive: false})
            .setLatLng([pt[1], pt[0]]).setContent(esc(l.feature.properties.name)).addTo(groups[lay.group]);
        }
      });
    }
    gj.addTo(groups[lay.group]);
    handle.layers[lay.key] = gj;
    handle.groups[lay.key] = groups[lay.group];
    handle.expected[lay.key] = lay.expected;
  });

  var Legend = L.Control.extend({
    options: {position: "bottomright"},
    onAdd: function () {
      var div = L.DomUtil.create("div", "geoexp-legend");
      div.id = "geoexp-legend";
      div.innerHTML = {{ this.legend_html }};
      L.DomEvent.disableClickPropagation(div);
      L.DomEvent.disableScrollPropagation(div);
      return div;
    }
  });
  handle.legend = new Legend().addTo(map);
"""
# Leaves the handle (window.geoexpMap) that the browser tests read.
_SCRIPT_CLOSE = """
  window.geoexpMap = handle;
})();
{% endmacro %}
"""

# The planning page's own script: the shared parts, probability styles, and
# the zone export button.
_PAGE_TEMPLATE = (
    """
{% macro header(this, kwargs) %}
<style>
.geoexp-legend { background: rgba(255,255,255,0.94); padding: 8px 10px; border-radius: 4px;
  box-shadow: 0 1px 4px rgba(0,0,0,0.35); font: 12px/1.35 system-ui, sans-serif; color: #111;
  max-width: 300px; max-height: 70vh; overflow-y: auto; }
.geoexp-legend td { padding: 1px 4px 1px 0; vertical-align: middle; }
.geoexp-save { background: #fff; border: 2px solid rgba(0,0,0,0.3); border-radius: 4px;
  padding: 4px 6px; font: 12px system-ui, sans-serif; cursor: pointer; }"""
    + _SHARED_CSS
    + """</style>
{% endmacro %}
{% macro script(this, kwargs) %}"""
    + _SCRIPT_OPEN
    + """  function unitTip(meta) {
    return function (layer) {
      var p = layer.feature.properties, rows = [["unit", p.id]];
      if (p.d !== undefined) rows.push(["street", p.d]);
      if (p.ds !== undefined) rows.push(["district", p.ds]);
      if (p.c !== undefined) rows.push(["condition", meta.labels[p.c] || p.c]);
      rows.push(["eligible", p.e ? "yes" : "no"]);
      if (p.p) { for (var j = 0; j < p.p.length; j++) rows.push(["P(" + meta.prob_labels[j] + ")", fmt(p.p[j])]); }
      return '<table class="geoexp-tip">' + rows.map(function (r) {
        return "<tr><td><b>" + esc(r[0]) + "</b></td><td>" + esc(r[1]) + "</td></tr>"; }).join("") + "</table>";
    };
  }
  function probStyle(j, base) {
    return function (f) {
      var v = f.properties.p ? f.properties.p[j] : null;
      if (v === null || v === undefined || v <= 0) {
        return {color: cfg.never_colour, weight: 1, dashArray: "2 3", opacity: 0.9};
      }
      var k = Math.min(cfg.prob_colours.length - 1, Math.floor(v * cfg.prob_colours.length));
      return {color: cfg.prob_colours[k], weight: base, opacity: 1};
    };
  }
  function layerStyle(lay) {
    return lay.kind === "probability" ? probStyle(lay.index, lay.weight)
      : function () { return lay.style; };
  }"""
    + _SCRIPT_EXPAND
    + """  var handle = {map: map, layers: {}, groups: {}, expected: {}, drawn: null, legend: null};"""
    + _SCRIPT_LAYERS
    + """
  var drawn = groups[cfg.draw_group];
  handle.drawn = drawn;
  handle.zones = function () {
    var fc = drawn.toGeoJSON();
    var when = new Date().toISOString().slice(0, 10);
    fc.features.forEach(function (f, i) { f.properties = {zone: i + 1, drawn_on: when}; });
    return fc;
  };
  var Save = L.Control.extend({
    options: {position: "topleft"},
    onAdd: function () {
      var b = L.DomUtil.create("button", "geoexp-save");
      b.id = "geoexp-save-zones";
      b.type = "button";
      b.title = "Save the drawn polygons and rectangles as a GeoJSON file for [eligible] exclude";
      b.textContent = "Save zones";
      L.DomEvent.disableClickPropagation(b);
      L.DomEvent.on(b, "click", function () {
        var blob = new Blob([JSON.stringify(handle.zones())], {type: "application/geo+json"});
        var a = document.createElement("a");
        a.href = URL.createObjectURL(blob);
        a.download = cfg.zones_filename;
        document.body.appendChild(a);
        a.click();
        setTimeout(function () { URL.revokeObjectURL(a.href); a.remove(); }, 1000);
      });
      return b;
    }
  });
  new Save().addTo(map);"""
    + _SCRIPT_CLOSE
)


def _line_sample(colour: str, width: float, dash: str | None, opacity: float = 1.0) -> str:
    dash_attr = f' stroke-dasharray="{dash}"' if dash else ""
    return (
        f'<svg width="44" height="14" aria-hidden="true"><line x1="2" y1="7" x2="42" y2="7" '
        f'stroke="{colour}" stroke-width="{width:g}" stroke-opacity="{opacity:g}"{dash_attr}/></svg>'
    )


def _fill_sample(colour: str, opacity: float, stroke: str | None = None) -> str:
    line = f' stroke="{stroke}" stroke-width="1.5"' if stroke else ""
    return (
        f'<svg width="44" height="14" aria-hidden="true"><rect x="2" y="1" width="40" height="12" '
        f'fill="{colour}" fill-opacity="{opacity:g}"{line}/></svg>'
    )


def _legend_html(title: str, rows: list[str], notes: Sequence[str], caution: str) -> str:
    parts = [f"<h4>{html.escape(title)}</h4>"]
    parts += [f'<div class="sub">{html.escape(n)}</div>' for n in notes[:1]]
    parts.append("<table>" + "".join(rows) + "</table>")
    parts += [f'<div class="note">{html.escape(n)}</div>' for n in notes[1:]]
    parts.append(f'<div class="caution">{html.escape(caution)}</div>')
    return "".join(parts)


def _legend_row(sample: str, label: str) -> str:
    return f"<tr><td>{sample}</td><td>{html.escape(label)}</td></tr>"


def _style_js(code: str) -> dict:
    s = condition_style(code)
    out = {"color": s.colour, "weight": s.width, "opacity": s.opacity, "lineCap": "butt"}
    if s.dash_array:
        out["dashArray"] = s.dash_array
    return out


def _add_districts(page: _Page, districts: gpd.GeoDataFrame | None, how: str) -> None:
    if districts is None or len(districts) == 0:
        return
    geoms = _to_web(districts.geometry, 2.0 / _metres_per_unit(districts))
    label_at = shapely.get_coordinates(
        shapely.point_on_surface(np.asarray(districts.geometry.to_crs(WGS84).array, dtype=object))
    ).round(DECIMALS)
    props = [
        {"name": n, "label_at": [float(x), float(y)]}
        for n, (x, y) in zip(districts["name"], label_at, strict=True)
    ]
    page.datasets["districts"] = {"data": _feature_collection(geoms, props), "meta": {}}
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
    page.legend.append(_legend_row(_line_sample("#4d4d4d", 1.5, "12 4 2 4"), f"District ({how})"))


def _add_rings(
    page: _Page,
    group,
    rings: np.ndarray,
    labels: Sequence[str],
    *,
    fill_opacity: float,
    sample_opacity: float,
) -> None:
    """One switchable layer per band ring, in the band's colour, all in one group.

    Each ring is its own dataset and layer, so the browser can style and
    count it on its own; the legend gets one filled sample per ring.
    """
    web = _to_web(gpd.GeoSeries(rings, crs=page.frame.crs), 1.0 / _metres_per_unit(page.frame))
    for k, label in enumerate(labels):
        s = condition_style(f"spillover_{k + 1}")
        page.datasets[f"ring_{k + 1}"] = {
            "data": _feature_collection(web[k : k + 1], [{"name": label}]),
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
                "style": {
                    "color": s.colour,
                    "weight": 1,
                    "opacity": 0.8,
                    "fillColor": s.colour,
                    "fillOpacity": fill_opacity,
                    "dashArray": "3 3",
                },
            }
        )
        page.legend.append(_legend_row(_fill_sample(s.colour, sample_opacity, s.colour), label))


def _add_eligible(page: _Page, n_eligible: int) -> None:
    """The eligible units as a broad halo under the unit lines, with its legend row."""
    page.declare(
        "eligible",
        "Eligible units",
        "units",
        True,
        n_eligible,
        kind="eligible",
        style=_style_js("eligible"),
        tip="unit",
    )
    halo = condition_style("eligible")
    page.legend.append(
        _legend_row(
            _line_sample(halo.colour, halo.width, None, halo.opacity), f"eligible ({n_eligible:,})"
        )
    )


def _unit_dataset(
    frame: gpd.GeoDataFrame,
    description_column: str | None,
    district_column: str | None,
    extra: pd.DataFrame,
    meta: dict,
) -> dict:
    """All units in one compact, column-wise record that the page expands into GeoJSON.

    Coordinates are whole millionths of a degree (about 0.1 m) counted from the
    south-west corner, text repeated across units (districts, conditions) is
    stored once, and probabilities are whole thousandths. This keeps the page
    for a city of a few thousand segments well under a megabyte.
    """
    per_metre = _metres_per_unit(frame)
    geoms = _to_web(frame.geometry, SIMPLIFY_M / per_metre)
    xy = shapely.get_coordinates(geoms)
    origin = np.floor(xy.min(axis=0) * 10**DECIMALS).astype(np.int64)
    as_int = shapely.transform(geoms, lambda c: np.round(c * 10**DECIMALS) - origin.astype(float))
    text = shapely.to_geojson(as_int)
    types = shapely.get_type_id(geoms)
    coords = [_COORDS.search(t).group(1) for t in text]
    out: dict = {
        "origin": origin.tolist(),
        "scale": 10.0**-DECIMALS,
        "t": _GEOJSON_TYPES[int(types[0])]
        if (types == types[0]).all()
        else [_GEOJSON_TYPES[int(t)] for t in types],
        "g": "@@COORDS@@",
        "id": frame.index.astype(str).tolist(),
        "e": extra["e"].astype(int).tolist(),
    }
    if description_column and description_column in frame.columns:
        out["d"] = frame[description_column].fillna("").astype(str).tolist()
    if district_column and district_column in frame.columns:
        codes, names = pd.factorize(frame[district_column].fillna("").astype(str))
        out["ds"], out["dsn"] = codes.tolist(), names.tolist()
    if "c" in extra.columns:
        codes, names = pd.factorize(extra["c"].astype(str))
        out["c"], out["cn"] = codes.tolist(), names.tolist()
    if "p" in extra.columns:
        per_mille = np.round(np.asarray(extra["p"].tolist(), dtype=float) * 1000.0)
        out["p"] = [[None if np.isnan(v) else int(v) for v in row] for row in per_mille]
    # The coordinate arrays are already JSON text; splice them in rather than re-parse.
    body = json.dumps(out, separators=(",", ":"))
    body = body.replace('"@@COORDS@@"', "[" + ",".join(_INT_FLOAT.sub("", c) for c in coords) + "]")
    return {"compact": _Raw(body), "meta": meta}


class _Raw(str):
    """JSON text to be spliced into the page as it is."""


_COORDS = re.compile(r'"coordinates":(.*)\}$')
_INT_FLOAT = re.compile(r"\.0(?=[,\]])")
_GEOJSON_TYPES = {
    0: "Point",
    1: "LineString",
    3: "Polygon",
    4: "MultiPoint",
    5: "MultiLineString",
    6: "MultiPolygon",
}


def _dump(value) -> str:
    """JSON text of the datasets, splicing in pre-built parts."""
    if isinstance(value, _Raw):
        return str(value)
    if isinstance(value, dict):
        return "{" + ",".join(f"{json.dumps(k)}:{_dump(v)}" for k, v in value.items()) + "}"
    return json.dumps(value, separators=(",", ":"))


# ------------------------------------------------------------------ public API


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
    (hidden at first; viridis classes, van der Walt & Smith 2015). Tooltips
    give unit id, street description, district, condition and probabilities.
    A legend, a scale bar, and a drawing tool for polygons and rectangles
    whose "Save zones" button writes a GeoJSON file that the design spec's
    ``[eligible] exclude = [...]`` accepts back.

    Parameters
    ----------
    trial : TrialFile or path
        A trial file with a drawn assignment.
    districts : path or GeoDataFrame, optional
        District polygons. By default the sample city's districts for the
        sample city, else outlines drawn around each district's units (from the
        spec's ``district_column``).
    tiles : str or None
        ``"auto"`` (OpenStreetMap for real places; a plain background for the
        invented sample city, which lies in the open ocean), None for a plain
        background, or any tile name or URL template folium accepts.

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
    page = _Page(units, tiles, title)

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
    page.datasets["units"] = _unit_dataset(
        units,
        spec.field.description_column,
        spec.field.district_column,
        extra,
        {"labels": labels, "prob_labels": [labels[c] for c in prob_codes]},
    )

    dist_frame, how = _districts_layer(districts, units, spec.field.district_column, page.sample)
    _add_districts(page, dist_frame, how)

    # Rings around the treated units at the band distances.
    treated = units.geometry[assignment["treated"].astype(bool).to_numpy()]
    if len(treated) and bands:
        rings = _rings(treated, bands)
        group = page.group(
            "Buffer rings " + ", ".join(f"{b:g}" for b in bands) + f" m ({len(rings)})", True
        )
        _add_rings(page, group, rings, _ring_labels(bands), fill_opacity=0.12, sample_opacity=0.18)
        if spec.exposure.metric != "euclidean":
            page.legend.append(
                _legend_row(
                    "",
                    f"(rings are straight-line; the design measures {spec.exposure.metric} distance)",
                )
            )

    _add_eligible(page, int(eligible.sum()))
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
            style=_style_js(code),
            tip="unit",
        )
    for code in codes:
        s = condition_style(code)
        page.legend.append(
            _legend_row(
                _line_sample(s.colour, s.width, s.dash_array),
                f"{labels[code]} ({int(counts.get(code, 0)):,})",
            )
        )
    for j, code in enumerate(prob_codes):
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
        )
    colours = _prob_colours()
    edges = np.linspace(0, 1, PROB_BINS + 1)
    page.legend.append(_legend_row("", "Probability layers (hidden at first):"))
    page.legend.append(_legend_row(_line_sample(NEVER_COLOUR, 1, "2 3"), "probability 0 (never)"))
    for k, col in enumerate(colours):
        page.legend.append(
            _legend_row(_line_sample(col, 3, None), f"{edges[k]:.1f} to {edges[k + 1]:.1f}")
        )

    draw_group = page.group("Drawn exclusion zones", True)
    drawn_at = tf.meta.get("drawn_at", "")[:10]
    notes = [
        f"design {tf.spec_hash[:12]} · seed {tf.meta.get('seed', '?')} · drawn {drawn_at} · "
        f"{tf.meta.get('n_draws', '?')} Monte Carlo draws",
        _DRAW_NOTE,
    ]
    return page.finish(draw_group, notes, CAUTION)


def drawing_map(
    units,
    *,
    eligible: Sequence[bool] | np.ndarray | pd.Index | None = None,
    districts: str | os.PathLike | gpd.GeoDataFrame | None = None,
    district_column: str | None = "district",
    description_column: str | None = "description",
    zones: Sequence[str | os.PathLike] = (),
    title: str = "Exclusion zones",
    tiles: str | None = "auto",
):
    """Map of the units with only the drawing tool, to sketch exclusion zones before a design.

    Parameters
    ----------
    units : UnitSet or GeoDataFrame
        The unit layer (projected CRS), indexed by unit id.
    eligible : bool mask or ids, optional
        Units that are eligible so far; drawn as a broad halo.
    districts : path or GeoDataFrame, optional
        District polygons (see :func:`planning_map`).
    district_column, description_column : str, optional
        Unit columns shown in tooltips.
    zones : sequence of paths
        Exclusion zones already in use, shown for reference.
    title : str
        Heading of the legend.
    tiles : str or None
        As in :func:`planning_map`.

    Returns
    -------
    folium.Map
    """
    from geoexp.cautions import CAUTION

    frame = units.frame if hasattr(units, "frame") else units
    if not isinstance(frame, gpd.GeoDataFrame) or frame.crs is None:
        raise InputError("drawing_map needs a UnitSet or a GeoDataFrame with a CRS")
    _metres_per_unit(frame)  # refuses a geographic CRS early, with a clear message
    if eligible is None:
        mask = np.zeros(len(frame), dtype=bool)
    elif isinstance(eligible, pd.Index) or (
        len(eligible) and not isinstance(np.asarray(eligible).flat[0], (bool, np.bool_))
    ):
        ids = pd.Index(eligible)
        unknown = ids.difference(frame.index)
        if len(unknown):
            from geoexp.errors import describe_rows

            raise InputError(f"eligible ids not among the units: {describe_rows(unknown)}")
        mask = np.asarray(frame.index.isin(ids))
    else:
        mask = np.asarray(eligible, dtype=bool)
        if mask.shape != (len(frame),):
            raise InputError(f"eligible mask has {mask.size} entries for {len(frame)} units")

    page = _Page(frame, tiles, title)
    extra = pd.DataFrame({"e": mask.astype(int)}, index=frame.index)
    page.datasets["units"] = _unit_dataset(
        frame, description_column, district_column, extra, {"labels": {}, "prob_labels": []}
    )
    dist_frame, how = _districts_layer(districts, frame, district_column, page.sample)
    _add_districts(page, dist_frame, how)
    for k, path in enumerate(zones):
        zf = _read_polygons(path, "exclusion zones", frame.crs)
        key = f"zones_{k + 1}"
        page.datasets[key] = {
            "data": _feature_collection(
                _to_web(zf.geometry, 0.0), [{"name": f"{Path(path).name}"}] * len(zf)
            ),
            "meta": {},
        }
        page.declare(
            f"zones:{k + 1}",
            f"Zones in {Path(path).name}",
            key,
            True,
            len(zf),
            kind="plain",
            tip="name",
            style={
                "color": "#000000",
                "weight": 1.5,
                "fillColor": "#000000",
                "fillOpacity": 0.1,
                "dashArray": "2 3",
            },
        )
        page.legend.append(
            _legend_row(_fill_sample("#000000", 0.12, "#000000"), f"zones in {Path(path).name}")
        )
    if mask.any():
        _add_eligible(page, int(mask.sum()))
    page.declare(
        "units",
        "All units",
        "units",
        True,
        len(frame),
        kind="plain",
        tip="unit",
        style={"color": "#333333", "weight": 1.5, "opacity": 0.9},
    )
    page.legend.append(_legend_row(_line_sample("#333333", 1.5, None), f"unit ({len(frame):,})"))
    draw_group = page.group("Drawn exclusion zones", True)
    notes = [
        f"{len(frame):,} units · {dt.date.today().isoformat()}",
        _DRAW_NOTE,
    ]
    return page.finish(draw_group, notes, CAUTION)


def map_html(m) -> tuple[str, list[str]]:
    """Render a folium map to a page with its scripts inlined; also return remaining remote URLs."""
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


__all__ = ["drawing_map", "map_html", "planning_map", "save_map"]
