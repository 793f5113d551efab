"""Legends at laptop size (1280 x 720) in headless Chromium: they fold away and never cover the
layer switcher or the city; probability classes fitted to the data; the sign and bands in grey.

Reuses the browser of ``test_browser.py`` (every request other than file:// is blocked; in
CI a missing browser or driver is a failure, not a skip).
"""

from __future__ import annotations

import re

import numpy as np
import pytest

# pytest puts tests/ on sys.path (rootdir-relative imports, no __init__.py).
import test_browser as shared

from geoexp.maps import planning_map, save_map

pytestmark = pytest.mark.browser

browser = shared.browser
LAPTOP = {"width": 1280, "height": 720}


@pytest.fixture
def laptop(browser):
    contexts = []

    def _open(path):
        context = browser.new_context(viewport=LAPTOP)
        contexts.append(context)
        blocked, errors = [], []

        def route(r):
            if r.request.url.startswith("file:"):
                r.continue_()
            else:
                blocked.append(r.request.url)
                r.abort()

        context.route("**/*", route)
        page = context.new_page()
        page.on("pageerror", lambda e: errors.append(str(e)))
        page.goto(path.resolve().as_uri())
        page.wait_for_function("window.geoexpMap !== undefined", timeout=20_000)
        page.wait_for_timeout(300)
        assert blocked == [] and errors == []
        return page

    yield _open
    for c in contexts:
        c.close()


def _box(page, selector: str) -> dict:
    box = page.locator(selector).first.bounding_box()
    assert box is not None, selector
    return box


def _overlap(a: dict, b: dict) -> bool:
    return not (
        a["x"] + a["width"] <= b["x"]
        or b["x"] + b["width"] <= a["x"]
        or a["y"] + a["height"] <= b["y"]
        or b["y"] + b["height"] <= a["y"]
    )


def _legend_behaves(page) -> None:
    layers = _box(page, ".leaflet-control-layers")
    body = page.locator("#geoexp-legend-body")
    # At 1280 x 720 the legend opens folded: only its header button shows.
    assert not body.is_visible()
    assert page.get_attribute("#geoexp-legend-toggle", "aria-expanded") == "false"
    folded = _box(page, "#geoexp-legend")
    assert folded["height"] < 40 and not _overlap(folded, layers)
    page.click("#geoexp-legend-toggle")
    assert body.is_visible()
    opened = _box(page, "#geoexp-legend")
    assert not _overlap(opened, layers), (opened, layers)
    assert opened["y"] + opened["height"] <= LAPTOP["height"]
    # A long legend scrolls inside its body instead of growing over the switcher.
    assert page.evaluate(
        "(() => { const b = document.getElementById('geoexp-legend-body');"
        " return b.scrollHeight <= b.clientHeight + 1 || getComputedStyle(b).overflowY === 'auto'; })()"
    )
    page.click("#geoexp-legend-toggle")
    assert not body.is_visible()
    # Every attribution a licence requires is still shown.
    assert "Leaflet" in page.inner_text(".leaflet-control-attribution")


def test_planning_legend_at_laptop_size(trial, laptop, tmp_path):
    page = laptop(save_map(planning_map(trial, tiles=None), tmp_path / "plan.html"))
    _legend_behaves(page)
    # Probability classes fitted to the data: the colours follow the printed bounds.
    p = trial.assignment()["p_treated"].to_numpy(float)
    layer = page.evaluate(
        """() => {
          const h = window.geoexpMap, key = "probability:treated";
          h.map.addLayer(h.groups[key]);
          const lay = h.layers[key];
          return lay.getLayers().map(l => [l.feature.properties.i, l.options.color]);
        }"""
    )
    cfg = page.evaluate(
        "(() => { const out = {}; for (const [k, g] of Object.entries(window.geoexpMap.layers))"
        " out[k] = 1; return out; })()"
    )
    assert "probability:treated" in cfg
    colours = {i: c for i, c in layer}
    positive = np.flatnonzero(p > 0)
    used = {colours[i] for i in positive}
    assert len(used) == 5  # five classes over the real range, not two
    # Quantile classes: each holds about a fifth of the units that can be treated
    # (ties at a bound may move a few units; np.quantile is the reference).
    counts = np.array([sum(colours[i] == c for i in positive) for c in used])
    assert counts.min() >= 0.1 * positive.size
    page.click("#geoexp-legend-toggle")
    legend = page.inner_text("#geoexp-legend-body")
    q = np.quantile(p[positive], [0.2, 0.4])
    for bound in np.round(q, 3):
        assert f"{bound:.3f}" in legend
    assert re.search(r"above 0\.\d{3} to 0\.\d{3}", legend)
    # The bands are filled with different patterns, so they differ in grey.
    fills = page.evaluate(
        """() => ["ring:1", "ring:2"].map(k =>
             window.geoexpMap.layers[k].getLayers()[0]._path.getAttribute("fill"))"""
    )
    assert fills[0].startswith("url(#geoexp-hatch-") and fills[1].startswith("url(#geoexp-hatch-")
    assert fills[0] != fills[1]


def test_result_legend_at_laptop_size(demo, laptop):
    page = laptop(demo / "results_map.html")
    _legend_behaves(page)
    # The folded legend covers no unit of the city.
    folded = _box(page, "#geoexp-legend")
    covered = page.evaluate(
        """(box) => {
          const h = window.geoexpMap;
          let n = 0;
          for (const [key, gj] of Object.entries(h.layers)) {
            if (!key.startsWith("condition:")) continue;
            for (const l of gj.getLayers()) {
              const r = l._path.getBoundingClientRect();
              if (r.right > box.x && r.left < box.x + box.width &&
                  r.bottom > box.y && r.top < box.y + box.height) n++;
            }
          }
          return n;
        }""",
        folded,
    )
    assert covered == 0
    # The sign survives greyscale: every unit whose count fell carries the white stripe.
    stripes = page.evaluate(
        """() => {
          const h = window.geoexpMap, out = {};
          for (const [key, gj] of Object.entries(h.layers)) {
            if (key.startsWith("decrease:")) out[key] = gj.getLayers().map(l => l.feature.properties.i);
          }
          return out;
        }"""
    )
    change = np.array(page.evaluate("window.geoexpMap.values.change"), dtype=float)
    striped = sorted(i for ids in stripes.values() for i in ids)
    assert striped == sorted(np.flatnonzero(change < 0).tolist())
    assert len(striped) > 0
