"""Tests of the printable briefing pack: pages, paper sizes, text layer, rendering, map furniture."""

from __future__ import annotations

import dataclasses
import math
import os
import re
import shutil
import subprocess
from pathlib import Path

import matplotlib.image as mpimg
import numpy as np
import pyproj
import pytest
from hypothesis import given
from hypothesis import strategies as st
from matplotlib.figure import Figure
from matplotlib.patches import Rectangle

from geoexp.briefing import briefing_pack, page_layout, plan_briefing
from geoexp.errors import InputError
from geoexp.maps import nice_length, scale_bar, true_north_angle
from geoexp.trialfile import TrialFile


def poppler(tool: str) -> str:
    """Path of a poppler tool; missing in CI is a failure, elsewhere a skip."""
    found = shutil.which(tool)
    if found is None:
        message = f"poppler's {tool} is missing (Debian package poppler-utils)"
        if os.environ.get("CI") == "true":
            pytest.fail(message + "; .ci/run must install it")
        pytest.skip(message)
    return found


def run(*args: str) -> str:
    return subprocess.run(args, check=True, capture_output=True, text=True).stdout


def pdf_pages(path: Path) -> int:
    return int(re.search(r"^Pages:\s+(\d+)", run(poppler("pdfinfo"), str(path)), re.M).group(1))


def pdf_tokens(path: Path, page: int | None = None) -> set[str]:
    args = [poppler("pdftotext"), "-layout"]
    if page is not None:
        args += ["-f", str(page), "-l", str(page)]
    return set(run(*args, str(path), "-").split())


def treated_by_district(trial_path: Path) -> dict[str, list[str]]:
    """Treated unit ids per district, read straight from the trial file's layers."""
    tf = TrialFile.open(trial_path)
    district = tf.spec().field.district_column
    assign = tf.assignment()
    treated = assign.index[assign["treated"].astype(bool)]
    if district is None:
        return {"All units": [str(i) for i in treated]}
    names = tf.units()[district].reindex(treated)
    return {d: [str(i) for i in treated[names.to_numpy() == d]] for d in sorted(set(names))}


def expected_pages(groups: dict[str, list[str]], paper: str) -> int:
    """Cover + overview + per district one map page, the continuation pages of its list
    and its visit-log sheets (one row per place, at least one sheet)."""
    lay = page_layout(paper)
    return 2 + sum(
        1
        + math.ceil(max(0, len(ids) - lay.rows_first) / lay.rows_continued)
        + max(1, math.ceil(len(ids) / lay.rows_log))
        for ids in groups.values()
    )


@pytest.fixture(scope="module")
def demo_trial(demo_outputs) -> Path:
    return demo_outputs["trial"]


@pytest.fixture(scope="module")
def packs(demo_trial, tmp_path_factory) -> dict[str, Path]:
    out = tmp_path_factory.mktemp("packs")
    return {
        paper: briefing_pack(demo_trial, out / f"pack_{paper}.pdf", paper=paper)
        for paper in ("a4", "letter")
    }


@pytest.fixture(scope="module")
def one_district_trial(demo_trial, tmp_path_factory) -> Path:
    """The demo trial without a district column and with an instructions column."""
    path = tmp_path_factory.mktemp("one_district") / "trial.gpkg"
    shutil.copy2(demo_trial, path)
    tf = TrialFile.open(path)
    spec = tf.spec()
    spec = spec.replace(
        field=dataclasses.replace(
            spec.field, district_column=None, instructions_column="visit_notes"
        )
    )
    units = tf.units()
    units = units.assign(
        visit_notes=np.where(
            tf.assignment()["treated"].astype(bool).reindex(units.index),
            "Walk the whole block twice per shift; note broken lights",
            "",
        )
    )
    tf.write_layers({"units": units}, meta={"spec_toml": spec.to_toml()})
    return path


@pytest.mark.parametrize("paper", ["a4", "letter"])
def test_page_count_is_planned_from_the_data(packs, demo_trial, paper):
    groups = treated_by_district(demo_trial)
    expected = expected_pages(groups, paper)
    assert pdf_pages(packs[paper]) == expected
    assert plan_briefing(demo_trial, paper=paper).n_pages == expected
    # 8 districts of the sample city, each with treated units in the demo design
    assert len(groups) == 8


@pytest.mark.parametrize(("paper", "size"), [("a4", (595, 842)), ("letter", (612, 792))])
def test_paper_size(packs, paper, size):
    # ISO 216: A4 is 210 x 297 mm; US Letter is 8.5 x 11 in; PDF points are 1/72 in.
    info = run(poppler("pdfinfo"), str(packs[paper]))
    w, h = map(float, re.search(r"Page size:\s+([\d.]+) x ([\d.]+) pts", info).groups())
    assert (round(w), round(h)) == size
    assert (round(210 / 25.4 * 72), round(297 / 25.4 * 72)) == (595, 842)  # the same, by hand


@pytest.mark.parametrize("paper", ["a4", "letter"])
def test_every_page_renders_and_is_not_blank(packs, tmp_path, paper):
    poppler("pdftoppm")
    run(poppler("pdftoppm"), "-r", "30", "-gray", "-png", str(packs[paper]), str(tmp_path / "p"))
    pngs = sorted(tmp_path.glob("p-*.png"))
    assert len(pngs) == pdf_pages(packs[paper])
    for png in pngs:
        pixels = mpimg.imread(png).astype(float)
        ink = np.mean(pixels < 0.9)  # share of pixels that are not (near) white paper
        assert pixels.var() > 1e-3, f"{png.name} is blank"
        assert ink > 0.005, f"{png.name} has almost no ink ({ink:.4f})"


def test_text_layer_holds_every_treated_unit_id(packs, demo_trial):
    ids = {i for group in treated_by_district(demo_trial).values() for i in group}
    assert len(ids) == 40  # the demo design treats 40 segments (quickstart.demo_spec)
    for path in packs.values():
        missing = ids - pdf_tokens(path)
        assert not missing, f"ids not in the text of {path.name}: {sorted(missing)}"


def test_each_district_lists_its_own_units_on_its_pages(packs, demo_trial):
    groups = treated_by_district(demo_trial)
    plan = plan_briefing(demo_trial, paper="a4")
    assert [d.name for d in plan.districts] == sorted(groups)
    for district in plan.districts:
        text = set().union(*(pdf_tokens(packs["a4"], p) for p in district.pages))
        assert set(groups[district.name]) <= text
        others = {i for name, ids in groups.items() if name != district.name for i in ids}
        assert not others & text, f"{district.name} pages list another district's units"
    cover = pdf_tokens(packs["a4"], 1)
    assert {"respect.", "trial", "lead."} <= cover  # the field-staff cautions are on the cover
    assert plan.n_pages == pdf_pages(packs["a4"])


def test_one_district_with_instructions_continues_its_list(one_district_trial, tmp_path):
    groups = treated_by_district(one_district_trial)
    assert list(groups) == ["All units"]
    lay = page_layout("letter")
    assert len(groups["All units"]) > lay.rows_first  # so the list must continue
    path = briefing_pack(one_district_trial, tmp_path / "one.pdf", paper="letter")
    n = pdf_pages(path)
    assert n == expected_pages(groups, "letter") >= 4
    assert set(groups["All units"]) <= pdf_tokens(path)
    assert "Instructions" in pdf_tokens(path, 3)
    log_sheets = math.ceil(len(groups["All units"]) / lay.rows_log)
    last_list_page = n - log_sheets
    assert {"Walk", "shift;"} <= pdf_tokens(path, last_list_page)  # the list's last page
    assert {"Officer", "Notes"} <= pdf_tokens(path, n)  # then the visit-log sheets
    # Every listed id sits on the page, above the footer band of the layout (PDF points from the top).
    boxes = run(poppler("pdftotext"), "-bbox", str(path), "-")
    words = re.findall(r'yMin="([\d.]+)" xMax="[\d.]+" yMax="([\d.]+)">([^<]+)</word>', boxes)
    placed = {word: float(y_max) for _, y_max, word in words if word in set(groups["All units"])}
    assert set(placed) == set(groups["All units"])
    assert all(0 < y < 72 * (lay.height - lay.margin - lay.footer) for y in placed.values())


def test_chosen_districts_and_errors(demo_trial, tmp_path):
    path = briefing_pack(demo_trial, tmp_path / "one.pdf", districts=["Saltvale"])
    assert pdf_pages(path) == 4  # cover, overview, map page, visit log
    assert set(treated_by_district(demo_trial)["Saltvale"]) <= pdf_tokens(path, 3)
    with pytest.raises(InputError, match="Nowhere"):
        briefing_pack(demo_trial, tmp_path / "bad.pdf", districts=["Saltvale", "Nowhere"])
    with pytest.raises(InputError, match="paper"):
        briefing_pack(demo_trial, tmp_path / "bad.pdf", paper="a3")  # type: ignore[arg-type]
    assert not (tmp_path / "bad.pdf").exists()
    assert [p.name for p in tmp_path.iterdir()] == ["one.pdf"]  # no temporary file left behind


def test_command_line(demo_trial, tmp_path):
    from typer.testing import CliRunner

    import geoexp.cli._briefing_commands  # noqa: F401  (registers the command)
    from geoexp.cli._app import app

    out = tmp_path / "pack.pdf"
    result = CliRunner().invoke(
        app, ["briefing", str(demo_trial), "--paper", "letter", "--out", str(out), "-d", "Saltvale"]
    )
    assert result.exit_code == 0, result.output
    assert "4 pages" in result.output
    assert pdf_pages(out) == 4
    result = CliRunner().invoke(app, ["briefing", str(demo_trial), "--paper", "a5"])
    assert result.exit_code != 0


@given(st.floats(min_value=1e-3, max_value=1e7, allow_nan=False))
def test_nice_length_is_the_largest_one_two_five_step(limit):
    length = nice_length(limit)
    mantissa = length / 10 ** math.floor(math.log10(length) + 1e-9)
    assert round(mantissa, 6) in (1.0, 2.0, 5.0)
    # steps 1-2-5-10 are at most 2.5 apart, so the next step up would exceed the limit
    assert length <= limit * (1 + 1e-9) and limit < 2.5 * length * (1 + 1e-9)


def test_scale_bar_honours_a_feet_crs():
    # US survey foot: pyproj reads the factor from the EPSG database (1200/3937 m, from memory)
    mpu = pyproj.CRS("EPSG:2263").axis_info[0].unit_conversion_factor
    assert mpu == pytest.approx(1200 / 3937)
    fig = Figure(figsize=(6, 4))
    ax = fig.add_axes((0, 0, 1, 1))
    ax.set_xlim(0, 12_000)  # 12,000 ft is about 3,658 m
    ax.set_ylim(0, 8_000)
    length_m = scale_bar(ax, metres_per_unit=mpu)
    assert length_m == 500  # largest 1-2-5 step within a quarter of 3,658 m
    blocks = [p for p in ax.patches if isinstance(p, Rectangle) and p.get_zorder() == 21]
    drawn_ft = sum(p.get_width() for p in blocks)
    assert drawn_ft * mpu == pytest.approx(500.0)
    assert drawn_ft == pytest.approx(500 / 0.3048006096, rel=1e-9)


@pytest.mark.parametrize(("lon", "lat"), [(-21.0, -30.0), (-19.0, -33.8), (-23.5, -31.0)])
def test_north_arrow_points_to_true_north(lon, lat):
    # pyproj's meridian convergence (projection factors) is the angle between grid and true north
    crs = pyproj.CRS("EPSG:32727")
    proj = pyproj.Proj(crs)
    x, y = proj(lon, lat)
    expected = proj.get_factors(lon, lat).meridian_convergence
    assert true_north_angle(crs, x, y) == pytest.approx(expected, abs=1e-3)
