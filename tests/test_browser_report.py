"""report.html printed to A4 by headless Chromium: its print stylesheet keeps every column.

Reuses the browser of ``test_browser.py``; the PDF is read back with poppler (in CI a
missing browser or poppler is a failure, not a skip).
"""

from __future__ import annotations

import re
import subprocess

import pytest

# pytest puts tests/ on sys.path (rootdir-relative imports, no __init__.py).
import test_browser as shared
from test_report_pdf import A4_POINTS, poppler

pytestmark = pytest.mark.browser

browser = shared.browser


def test_report_prints_on_a4_without_cutting_columns(demo_outputs, browser, tmp_path):
    context = browser.new_context()
    try:
        page = context.new_page()
        page.route(
            "**/*", lambda r: r.continue_() if r.request.url.startswith("file:") else r.abort()
        )
        page.goto(demo_outputs["report"].resolve().as_uri())
        pdf = tmp_path / "printed.pdf"
        page.pdf(path=str(pdf), format="A4", print_background=True)
    finally:
        context.close()
    boxes = subprocess.run(
        [poppler("pdftotext"), "-bbox", str(pdf), "-"], check=True, capture_output=True, text=True
    ).stdout
    size = re.search(r'<page width="([\d.]+)" height="([\d.]+)"', boxes)
    # A4 in points (Chromium rounds the page to whole hundredths of an inch)
    assert (
        abs(float(size.group(1)) - A4_POINTS[0]) < 2
        and abs(float(size.group(2)) - A4_POINTS[1]) < 2
    )
    words = re.findall(
        r'xMin="([\d.]+)" yMin="[\d.]+" xMax="([\d.]+)" yMax="[\d.]+">([^<]+)<', boxes
    )
    assert len(words) > 300
    # Nothing runs past the right edge of the page (a cut column would).
    for x0, x1, word in words:
        assert float(x0) >= 0 and float(x1) <= A4_POINTS[0], word
    text = " ".join(w for _, _, w in words)
    # The last columns of the wide tables, which the screen layout scrolled away on paper.
    for header in ("finding", "excluded", "reference"):  # headers print in words, capitalised
        assert header in text.lower(), header
    md = demo_outputs["report_md"].read_text(encoding="utf-8")
    header = next(line for line in md.splitlines() if line.lower().startswith("| contrast"))
    if "quotient" in md:
        assert "quotient" in text or "wdq" in text.lower()
    # Every finding of the estimates table is printed.
    findings = [
        row.split("|")[-2].strip()
        for row in md.splitlines()
        if row.startswith("| ") and row.count("|") == header.count("|") and row != header
    ]
    for finding in {f for f in findings if f and not f.startswith("-")}:
        for word in finding.split():
            assert word in text, finding
