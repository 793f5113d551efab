"""The interactive result map in a real browser: headless Debian Chromium driven by Playwright.

Reuses the browser, the offline page opener and the blank-screenshot check of
``test_browser.py`` (every request other than file:// is blocked; in CI a
missing browser or driver is a failure, not a skip). The page under test is
the ``results_map.html`` that the demo writes beside its report.
"""

from __future__ import annotations

import re

import numpy as np
import pytest

# pytest puts tests/ on sys.path (rootdir-relative imports, no __init__.py).
import test_browser as shared

pytestmark = pytest.mark.browser

browser = shared.browser
open_page = shared.open_page


def _findings(report_md: str) -> list[str]:
    """The verdict sentences, as the Markdown report lists them under 'Findings'."""
    section = report_md.split("## Findings", 1)[1].split("\n## ", 1)[0]
    return [line[2:].strip() for line in section.splitlines() if line.startswith("- ")]


def _hover_first_visible(page, key: str) -> str | None:
    """Move the real mouse over the first unit of a layer that is not covered; return its id."""
    target = page.evaluate(
        """(key) => {
          const h = window.geoexpMap, box = h.map.getContainer().getBoundingClientRect();
          for (const l of h.layers[key].getLayers()) {
            const p = h.map.latLngToContainerPoint(l.getCenter());
            const x = box.left + p.x, y = box.top + p.y;
            if (document.elementFromPoint(x, y) === l._path) return {x, y, id: l.feature.properties.id};
          }
          return null;
        }""",
        key,
    )
    if target is None:
        return None
    page.mouse.move(target["x"], target["y"])
    page.wait_for_selector(".leaflet-tooltip .geoexp-tip", timeout=5_000)
    return target["id"]


def _tooltip_rows(page) -> dict[str, str]:
    rows = page.eval_on_selector_all(
        ".leaflet-tooltip .geoexp-tip tr",
        "trs => trs.map(tr => Array.from(tr.cells).map(td => td.innerText.trim()))",
    )
    return {k: v for k, v in rows}


def test_result_map_in_browser(demo, trial, open_page, tmp_path):
    from geoexp.cautions import CAUTION

    o = open_page(demo / "results_map.html")
    page = o.page
    shared.check_loaded(o)
    assert page.locator(".leaflet-control-scale").count() == 1
    assert page.locator(".leaflet-control-layers").count() == 1

    # Drawn features per layer; reference: the trial file's assignment read with pandas.
    counts = o.drawn_counts()
    assignment = trial.assignment()
    for code, n in assignment["condition"].value_counts().items():
        assert counts[f"condition:{code}"] == n, code
        assert counts[f"casing:{code}"] == n, code
    assert sum(v for k, v in counts.items() if k.startswith("condition:")) == len(assignment)
    assert counts["ring:1"] == counts["ring:2"] == 1
    assert counts["districts"] == 8  # the sample city's districts

    # The legend: visible, with the estimates, every verdict and the caution.
    legend = page.locator("#geoexp-legend")
    assert legend.is_visible()
    text = " ".join(legend.inner_text().split())
    findings = _findings((demo / "report.md").read_text(encoding="utf-8"))
    assert len(findings) == len(trial.read("results"))
    for sentence in findings:
        assert " ".join(sentence.split()) in text
    assert page.locator("#geoexp-verdicts li").count() == len(findings)
    estimates = page.locator("#geoexp-estimates").inner_text()
    for row in trial.read("results").itertuples():
        assert f"{row.estimate:+.2f}" in estimates
        assert f"{row.ci_low:+.2f} to {row.ci_high:+.2f}" in estimates
    assert " ".join(CAUTION.split()) in text

    # Tooltips under the real mouse; reference: post - pre in the trial's outcomes layer.
    outcomes = trial.read("outcomes")
    outcomes.index = outcomes.index.astype(str)
    labels = dict(zip(assignment["condition"], assignment["condition_label"], strict=True))
    hovered = 0
    for code in ("treated", "spillover_1", "pure_control"):
        uid = _hover_first_visible(page, f"condition:{code}")
        if uid is None:
            continue
        rows = _tooltip_rows(page)
        assert rows["unit"] == uid
        assert rows["condition"] == labels[code]
        pre, post = outcomes.loc[uid, ["pre", "post"]]
        assert float(rows["pre"]) == pre
        assert float(rows["post"]) == post
        assert float(rows["change"]) == post - pre
        assert re.fullmatch(r"[0-9.]+", rows["P(treated)"])
        hovered += 1
        page.mouse.move(2, 2)
    assert hovered >= 2, "no unit could be hovered"

    shared._check_not_blank(o, tmp_path / "results_map.png")


def test_result_map_colours_in_browser(demo, open_page):
    """The colour each drawn path gets is the one its unit's change maps to."""
    o = open_page(demo / "results_map.html")
    drawn = o.page.evaluate(
        """() => {
          const h = window.geoexpMap, v = h.values, out = [];
          for (const [key, gj] of Object.entries(h.layers)) {
            if (!key.startsWith("condition:")) continue;
            for (const l of gj.getLayers()) {
              out.push([v.change[l.feature.properties.i], l._path.getAttribute("stroke")]);
            }
          }
          return out;
        }"""
    )
    change = np.array([c for c, _ in drawn], dtype=float)
    rgb = np.array([[int(s[i : i + 2], 16) for i in (1, 3, 5)] for _, s in drawn], dtype=float)
    # Diverging RdBu reversed (Harrower & Brewer 2003; from memory): decreases blue, increases red.
    assert (rgb[change < 0, 2] > rgb[change < 0, 0]).all()
    assert (rgb[change > 0, 0] > rgb[change > 0, 2]).all()
