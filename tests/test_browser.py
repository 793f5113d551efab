"""The saved maps in a real browser: headless Debian Chromium driven by Playwright.

Every request other than file:// is blocked, so a pass shows the page works
offline. In CI (CI=true) a missing browser or driver is a failure, not a skip.
"""

from __future__ import annotations

import io
import json
import os
import shutil
from pathlib import Path

import numpy as np
import pyproj
import pytest
import shapely

from geoexp.maps import drawing_map, planning_map, save_map

pytestmark = pytest.mark.browser

CHROMIUM = os.environ.get("GEOEXP_CHROMIUM", "/usr/bin/chromium")
ARGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]
IN_CI = os.environ.get("CI", "").lower() in ("1", "true", "yes")


def _unavailable(reason: str):
    if IN_CI:
        pytest.fail(f"browser test cannot run in CI: {reason}")
    pytest.skip(f"{reason} (outside CI this skips; in CI it fails)")


@pytest.fixture(scope="module")
def browser():
    if not (Path(CHROMIUM).exists() or shutil.which(CHROMIUM)):
        _unavailable(f"no Chromium at {CHROMIUM} (Debian package 'chromium')")
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        _unavailable("the Python package 'playwright' is not installed (pip install -e '.[test]')")
    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=ARGS)
        yield b
        b.close()


class Opened:
    """A page opened offline, with the requests it tried to make."""

    def __init__(self, browser, path: Path, tmp_path: Path, viewport=(1300, 850)):
        self.context = browser.new_context(
            viewport={"width": viewport[0], "height": viewport[1]}, accept_downloads=True
        )
        self.page = self.context.new_page()
        self.blocked: list[str] = []
        self.errors: list[str] = []
        self.page.on("pageerror", lambda e: self.errors.append(str(e)))

        def route(r):
            if r.request.url.startswith("file:"):
                r.continue_()
            else:
                self.blocked.append(r.request.url)
                r.abort()

        self.context.route("**/*", route)
        self.page.goto(path.resolve().as_uri())
        self.page.wait_for_function("window.geoexpMap !== undefined", timeout=20_000)
        self.tmp_path = tmp_path

    def drawn_counts(self) -> dict[str, int]:
        """Features per layer that have an SVG path in the document, each layer switched on."""
        return self.page.evaluate(
            """() => {
              const h = window.geoexpMap, out = {};
              for (const [key, gj] of Object.entries(h.layers)) {
                const group = h.groups[key];
                if (!h.map.hasLayer(group)) h.map.addLayer(group);
                out[key] = gj.getLayers().filter(l => l._path && l._path.isConnected).length;
              }
              return out;
            }"""
        )

    def close(self):
        self.context.close()


@pytest.fixture
def open_page(browser, tmp_path):
    opened: list[Opened] = []

    def _open(path: Path, viewport=(1300, 850)) -> Opened:
        o = Opened(browser, path, tmp_path, viewport)
        opened.append(o)
        return o

    yield _open
    for o in opened:
        o.close()


def check_loaded(o: Opened) -> None:
    """The page ran without errors or network requests, and its Leaflet map exists."""
    page = o.page
    assert o.errors == []
    assert o.blocked == [], "the page tried to reach the network"
    # Leaflet initialised and the map object exists.
    assert page.evaluate("typeof window.L === 'object' && L.version.startsWith('1.')")
    assert page.evaluate("window.geoexpMap.map instanceof L.Map")


def _check_common(o: Opened) -> None:
    page = o.page
    check_loaded(o)
    # The legend is there and visible.
    assert page.locator("#geoexp-legend").is_visible()
    # The drawing control offers polygon and rectangle, nothing else.
    tools = page.eval_on_selector_all(
        ".leaflet-draw-section .leaflet-draw-toolbar-top a",
        "els => els.map(e => e.className)",
    )
    kinds = sorted(c.split("leaflet-draw-draw-")[1].split()[0] for c in tools if "draw-draw-" in c)
    assert kinds == ["polygon", "rectangle"]
    # The scale bar.
    assert page.locator(".leaflet-control-scale").count() == 1


def _check_not_blank(o: Opened, path: Path) -> None:
    from PIL import Image

    png = o.page.screenshot(path=str(path))
    pixels = np.asarray(Image.open(io.BytesIO(png)).convert("RGB"), dtype=float)
    assert pixels.std() > 20.0  # a blank or single-colour page has (almost) no variance
    distinct = np.unique(pixels.reshape(-1, 3)[::7], axis=0)
    assert len(distinct) > 50


def test_planning_map_in_browser(trial, open_page, tmp_path):
    path = save_map(planning_map(trial, tiles=None), tmp_path / "plan.html")
    o = open_page(path)
    _check_common(o)
    assignment = trial.assignment()
    counts = o.drawn_counts()
    # Reference: the trial file read with pandas.
    for code, n in assignment["condition"].value_counts().items():
        assert counts[f"condition:{code}"] == n, code
    assert counts["eligible"] == int(assignment["eligible"].sum())
    probability = [k for k in counts if k.startswith("probability:")]
    assert len(probability) == sum(c.startswith("p_") for c in assignment.columns)
    assert all(counts[k] == len(assignment) for k in probability)
    assert counts["districts"] == 8  # the sample city's districts
    assert sorted(k for k in counts if k.startswith("ring:")) == ["ring:1", "ring:2"]
    assert all(counts[k] == 1 for k in ("ring:1", "ring:2"))
    legend = o.page.inner_text("#geoexp-legend")
    for label in assignment["condition_label"].unique():
        assert label in legend
    _check_not_blank(o, tmp_path / "plan.png")


def test_drawing_map_in_browser(demo, region, open_page, tmp_path):
    segments = region.segments.set_index("segment_id")
    eligible = segments.index[:300]
    path = save_map(
        drawing_map(
            segments, eligible=eligible, zones=[demo / "exclusion_zones.geojson"], tiles=None
        ),
        tmp_path / "draw.html",
    )
    o = open_page(path)
    _check_common(o)
    counts = o.drawn_counts()
    assert counts["units"] == len(segments)
    assert counts["eligible"] == 300
    assert counts["zones:1"] == 1
    _check_not_blank(o, tmp_path / "draw.png")


def test_saved_zones_exclude_exactly_the_units_inside(region_path, open_page, tmp_path):
    """Round trip through the real page: draw a rectangle, press 'Save zones', exclude."""
    from geoexp.units import UnitSet

    units = UnitSet.from_file(region_path, "segment_id", layer="segments")
    path = save_map(drawing_map(units, tiles=None), tmp_path / "draw.html")
    o = open_page(path)
    x0, y0, x1, y1 = units.frame.total_bounds
    to_lonlat = pyproj.Transformer.from_crs(units.crs, "EPSG:4326", always_xy=True)
    (lon0, lon1), (lat0, lat1) = to_lonlat.transform(
        [x0 + 0.4 * (x1 - x0), x0 + 0.55 * (x1 - x0)], [y0 + 0.4 * (y1 - y0), y0 + 0.5 * (y1 - y0)]
    )
    # What Leaflet.draw does when a rectangle is finished: fire draw:created on the map.
    o.page.evaluate(
        """([s, w, n, e]) => {
          const m = window.geoexpMap.map;
          const layer = L.rectangle([[s, w], [n, e]]);
          m.fire(L.Draw.Event.CREATED, {layer: layer, layerType: "rectangle"});
        }""",
        [lat0, lon0, lat1, lon1],
    )
    with o.page.expect_download() as info:
        o.page.click("#geoexp-save-zones")
    saved = tmp_path / "exclusion_zones.geojson"
    info.value.save_as(saved)
    assert info.value.suggested_filename == "exclusion_zones.geojson"
    fc = json.loads(saved.read_text(encoding="utf-8"))
    assert [f["geometry"]["type"] for f in fc["features"]] == ["Polygon"]

    kept = units.exclude(saved)
    dropped = set(units.ids.difference(kept.ids))
    # Reference: the saved ring back in the units' CRS with pyproj, tested with shapely.
    to_units = pyproj.Transformer.from_crs("EPSG:4326", units.crs, always_xy=True)
    ring = [to_units.transform(x, y) for x, y in fc["features"][0]["geometry"]["coordinates"][0]]
    hit = shapely.intersects(
        np.asarray(units.frame.geometry.array, dtype=object), shapely.Polygon(ring)
    )
    assert len(dropped) > 20
    assert dropped == set(units.ids[hit])


def test_only_tiles_need_the_network(trial, open_page, tmp_path):
    """With OpenStreetMap tiles and no network, the map still draws; only tiles were asked for."""
    path = save_map(planning_map(trial, tiles="OpenStreetMap"), tmp_path / "tiles.html")
    o = open_page(path)
    assert o.errors == []
    assert o.page.evaluate("window.geoexpMap.map instanceof L.Map")
    assert o.blocked, "the tiles were not requested at all"
    assert all("tile.openstreetmap.org" in url for url in o.blocked), o.blocked
    assert o.drawn_counts()["condition:treated"] == int(trial.assignment()["treated"].sum())


LAPTOP = (1280, 720)


def _visible_and_on_top(o: Opened, selector: str) -> bool:
    """The element is inside the viewport and nothing covers its centre."""
    return o.page.evaluate(
        """(sel) => {
          const el = document.querySelector(sel);
          if (!el) return false;
          const r = el.getBoundingClientRect();
          const x = r.left + r.width / 2, y = r.top + r.height / 2;
          if (r.width === 0 || x < 0 || y < 0 || x > innerWidth || y > innerHeight) return false;
          const top = document.elementFromPoint(x, y);
          return top === el || el.contains(top);
        }""",
        selector,
    )


def _legend_text(o) -> str:
    """The legend's text, opened first when it starts collapsed (as it does at laptop size)."""
    toggle = o.page.query_selector("#geoexp-legend-toggle")
    if toggle is not None and toggle.get_attribute("aria-expanded") == "false":
        toggle.click()
    return o.page.inner_text("#geoexp-legend")


def test_zones_in_force_shown_with_reasons_at_laptop_size(trial, demo, open_page, tmp_path):
    import geopandas as gpd

    path = save_map(planning_map(trial, tiles=None), tmp_path / "plan.html")
    o = open_page(path, LAPTOP)
    check_loaded(o)
    # Reference: the zone file the design's spec reads, read with geopandas.
    spec = trial.spec()
    assert [Path(z).name for z in spec.eligible.exclude] == ["exclusion_zones.geojson"]
    zones = gpd.read_file(demo / "exclusion_zones.geojson", engine="pyogrio")
    counts = o.drawn_counts()
    assert counts["zones:1"] == len(zones) == 1
    reason = zones["reason"].iloc[0]
    assert reason in _legend_text(o)
    tips = o.page.evaluate(
        """() => window.geoexpMap.layers["zones:1"].getLayers()
                 .map(l => l.getTooltip() && l.getTooltip().getContent())"""
    )
    assert len(tips) == 1 and reason in tips[0]
    # the zone is drawn inside the visible map at laptop size
    inside = o.page.evaluate(
        """() => {
          const l = window.geoexpMap.layers["zones:1"].getLayers()[0];
          const r = l._path.getBoundingClientRect();
          return r.width > 2 && r.height > 2 && r.right > 0 && r.bottom > 0 &&
                 r.left < innerWidth && r.top < innerHeight;
        }"""
    )
    assert inside


def test_drawing_round_trip_with_a_reason_at_laptop_size(region_path, open_page, tmp_path):
    """Draw a rectangle with the mouse, give its reason, save, exclude, and see it shown."""
    from geoexp.units import UnitSet

    units = UnitSet.from_file(region_path, "segment_id", layer="segments")
    path = save_map(drawing_map(units, tiles=None), tmp_path / "draw.html")
    o = open_page(path, LAPTOP)
    check_loaded(o)
    asked = []

    def answer(dialog):
        asked.append(dialog.message)
        dialog.accept("school grounds: an after-school programme runs here")

    o.page.on("dialog", answer)
    assert _visible_and_on_top(o, ".leaflet-draw-draw-rectangle")
    assert _visible_and_on_top(o, "#geoexp-save-zones")
    x0, y0, x1, y1 = units.frame.total_bounds
    to_lonlat = pyproj.Transformer.from_crs(units.crs, "EPSG:4326", always_xy=True)
    (lon0, lon1), (lat0, lat1) = to_lonlat.transform(
        [x0 + 0.42 * (x1 - x0), x0 + 0.52 * (x1 - x0)],
        [y0 + 0.42 * (y1 - y0), y0 + 0.5 * (y1 - y0)],
    )
    corners = o.page.evaluate(
        """([s, w, n, e]) => {
          const m = window.geoexpMap.map, box = m.getContainer().getBoundingClientRect();
          m.fitBounds([[s, w], [n, e]], {padding: [150, 150], animate: false});
          const a = m.latLngToContainerPoint([n, w]), b = m.latLngToContainerPoint([s, e]);
          return [a.x + box.left, a.y + box.top, b.x + box.left, b.y + box.top];
        }""",
        [lat0, lon0, lat1, lon1],
    )
    o.page.click(".leaflet-draw-draw-rectangle")
    mouse = o.page.mouse
    mouse.move(corners[0], corners[1])
    mouse.down()
    mouse.move((corners[0] + corners[2]) / 2, (corners[1] + corners[3]) / 2, steps=5)
    mouse.move(corners[2], corners[3], steps=5)
    mouse.up()
    assert len(asked) == 1 and "excluded" in asked[0]
    with o.page.expect_download() as info:
        o.page.click("#geoexp-save-zones")
    saved = tmp_path / "exclusion_zones.geojson"
    info.value.save_as(saved)
    fc = json.loads(saved.read_text(encoding="utf-8"))
    assert len(fc["features"]) == 1
    props = fc["features"][0]["properties"]
    assert props["reason"] == "school grounds: an after-school programme runs here"
    assert props["zone"] == 1
    # the rectangle drawn with the mouse holds the corners asked for (within a few pixels)
    ring = np.asarray(fc["features"][0]["geometry"]["coordinates"][0])
    span = max(lon1 - lon0, lat1 - lat0)
    assert abs(ring[:, 0].min() - lon0) < 0.05 * span and abs(ring[:, 0].max() - lon1) < 0.05 * span
    assert abs(ring[:, 1].min() - lat0) < 0.05 * span and abs(ring[:, 1].max() - lat1) < 0.05 * span
    # The saved file excludes the units it covers (shapely reference), and a map of the
    # zones shows the reason that was typed.
    kept = units.exclude(saved)
    to_units = pyproj.Transformer.from_crs("EPSG:4326", units.crs, always_xy=True)
    polygon = shapely.Polygon([to_units.transform(x, y) for x, y in ring])
    hit = shapely.intersects(np.asarray(units.frame.geometry.array, dtype=object), polygon)
    assert hit.sum() > 0
    assert set(units.ids.difference(kept.ids)) == set(units.ids[hit])
    again = open_page(
        save_map(drawing_map(units, zones=[saved], tiles=None), tmp_path / "d2.html"), LAPTOP
    )
    assert "school grounds" in _legend_text(again)
    assert again.drawn_counts()["zones:1"] == 1
