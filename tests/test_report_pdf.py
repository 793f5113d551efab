"""The PDF report: a one-page summary for command staff first, and nothing cut at the page edge."""

from __future__ import annotations

import os
import re
import shutil
import subprocess

import pytest

from geoexp.design import tool_version

A4_POINTS = (595.3, 841.9)  # ISO 216: 210 x 297 mm at 72 points per inch


def poppler(tool: str) -> str:
    """Path of a poppler tool; missing in CI is a failure, elsewhere a skip with the reason."""
    found = shutil.which(tool)
    if found is None:
        message = f"poppler's {tool} is missing (Debian package poppler-utils)"
        if os.environ.get("CI") == "true":
            pytest.fail(message + "; .ci/run must install it")
        pytest.skip(message)
    return found


def text(path, *extra: str) -> str:
    return subprocess.run(
        [poppler("pdftotext"), *extra, str(path), "-"], check=True, capture_output=True, text=True
    ).stdout


def test_summary_page_for_command_staff(demo_outputs):
    pdf = demo_outputs["report_pdf"]
    assert pdf.exists() and pdf.name == "report.pdf"
    first = " ".join(text(pdf, "-f", "1", "-l", "1").split())
    md = demo_outputs["report_md"].read_text(encoding="utf-8")
    assert "Summary for command staff" in first
    assert "number treated: 40 units" in first
    assert "post-period (the trial): 2026-01-01 to 2026-12-31" in first
    assert "incidents per unit" in first
    # The headline rows: every contrast with its interval and its finding, as the report has them.
    rows = re.findall(r"^\| (\S[^|]*?) \| (-?[\d.]+) \| [^|]+ \| (\S[^|]*?) \|", md, re.M)
    assert rows
    for contrast, _, interval in rows:
        assert contrast in first and interval in first
    assert "does not replace, ethics review" in first and "Local law governs" in first


def test_nothing_runs_off_the_page(demo_outputs, tmp_path):
    pdf = demo_outputs["report_pdf"]
    info = subprocess.run(
        [poppler("pdfinfo"), str(pdf)], check=True, capture_output=True, text=True
    ).stdout
    size = re.search(r"Page size:\s+([\d.]+) x ([\d.]+) pts", info)
    assert (
        abs(float(size.group(1)) - A4_POINTS[0]) < 1
        and abs(float(size.group(2)) - A4_POINTS[1]) < 1
    )
    boxes = text(pdf, "-bbox")
    words = re.findall(
        r'xMin="([\d.]+)" yMin="([\d.]+)" xMax="([\d.]+)" yMax="([\d.]+)">([^<]+)<', boxes
    )
    assert len(words) > 500
    for x0, y0, x1, y1, word in words:
        assert 0 <= float(x0) and float(x1) <= A4_POINTS[0] - 20, word
        assert 0 <= float(y0) and float(y1) <= A4_POINTS[1], word
    # Every column of the estimates table reaches the PDF (as a label of each row's block).
    whole = " ".join(text(pdf).split())
    for column in ("estimate", "std_error", "ci_by_test_inversion", "p_no_effect", "finding"):
        assert f"{column}" in whole
    assert "The trial at a glance" in whole and "Units through the design" in whole
    assert f"geoexp version: {tool_version()}" in whole
    # The pages render (poppler) and the first is not blank.
    subprocess.run(
        [
            poppler("pdftoppm"),
            "-r",
            "40",
            "-png",
            "-f",
            "1",
            "-l",
            "1",
            str(pdf),
            str(tmp_path / "p"),
        ],
        check=True,
    )
    assert any(p.stat().st_size > 2_000 for p in tmp_path.glob("p*.png"))


def test_report_says_the_plan(demo_outputs):
    md = demo_outputs["report_md"].read_text(encoding="utf-8")
    section = md.split("## The trial at a glance", 1)[1].split("\n## ", 1)[0]
    for needle in (
        "pre-period",
        "2025-01-01 to 2025-12-31",
        "eligibility rule",
        "top 150 by incidents_y1",
        "number treated | 40 units",
        "gap between treated units | 150 m",
        f"geoexp version | {tool_version()}",
    ):
        assert needle in section, needle
    assert "![Units through the design]" in md
    html = demo_outputs["report"].read_text(encoding="utf-8")
    assert "The trial at a glance" in html and "alt='Units through the design'" in html
