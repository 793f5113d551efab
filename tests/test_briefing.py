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
import shapely
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


def test_planar_feet_scale_bar_and_grid_north():
    from geoexp.maps import scale_bar_and_north_arrow
    from geoexp.units import planar_crs

    crs = planar_crs("ft")
    mpu = crs.axis_info[0].unit_conversion_factor
    assert mpu == 0.3048  # the international foot, exactly (1959 agreement)
    # a local grid has no geographic reference: the arrow points to grid north
    assert true_north_angle(crs, 1_000.0, 2_000.0) == 0.0
    fig = Figure(figsize=(6, 4))
    ax = fig.add_axes((0, 0, 1, 1))
    ax.set_xlim(0, 12_000)  # 12,000 ft; a quarter is 3,000 ft
    ax.set_ylim(0, 8_000)
    scale_bar_and_north_arrow(ax, crs=crs, metres_per_unit=mpu, bounds=(0, 0, 12_000, 8_000))
    blocks = [p for p in ax.patches if isinstance(p, Rectangle) and p.get_zorder() == 21]
    # largest 1-2-5 step within 3,000 ft is 2,000 ft, drawn 2,000 data units long
    assert sum(p.get_width() for p in blocks) == pytest.approx(2_000.0)
    texts = [t.get_text() for t in ax.texts]
    assert "2000 ft" in texts and "grid N" in texts
    assert not any(t.endswith(" m") or t.endswith("km") for t in texts)


@pytest.mark.parametrize(("lon", "lat"), [(-21.0, -30.0), (-19.0, -33.8), (-23.5, -31.0)])
def test_north_arrow_points_to_true_north(lon, lat):
    # pyproj's meridian convergence (projection factors) is the angle between grid and true north
    crs = pyproj.CRS("EPSG:32727")
    proj = pyproj.Proj(crs)
    x, y = proj(lon, lat)
    expected = proj.get_factors(lon, lat).meridian_convergence
    assert true_north_angle(crs, x, y) == pytest.approx(expected, abs=1e-3)


# ---- placement, greyscale, districts, visit logs --------------------------------------

LABEL_GIDS = ("place-number", "street-label", "district-label")
FURNITURE_GIDS = ("scale-bar", "north-arrow")


def _boxes(fig, gids):
    """Display extents of the artists of ``gids`` on every map of ``fig``, by gid."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.text import Annotation

    renderer = FigureCanvasAgg(fig).get_renderer()
    fig.draw(renderer)
    found = {g: [] for g in gids}
    for ax in fig.axes:
        for artist in ax.get_children():
            gid = artist.get_gid()
            if gid not in found:
                continue
            if isinstance(artist, Annotation):
                box = artist.arrow_patch.get_window_extent(renderer)
            else:
                box = artist.get_window_extent(renderer)
            found[gid].append((ax, artist, box))
    return renderer, found


def _marker_boxes(fig):
    """Each numbered place's marker as a box, from the scatter's own offsets and size."""
    out = []
    for ax in fig.axes:
        for coll in ax.collections:
            if coll.get_gid() != "place":
                continue
            centres = ax.transData.transform(coll.get_offsets())
            # scatter sizes are points squared: the marker's diameter is sqrt(s) points
            half = np.sqrt(coll.get_sizes()[0]) / 2 * fig.dpi / 72
            out += [(x - half, y - half, x + half, y + half) for x, y in centres]
    return out


def _overlap(a, b) -> bool:
    return a[0] < b[2] and b[0] < a[2] and a[1] < b[3] and b[1] < a[3]


@pytest.fixture(scope="module")
def figures(demo_trial, region):
    from geoexp.briefing import briefing_figures

    return list(briefing_figures(demo_trial, district_polygons=region.districts))


def test_no_label_or_furniture_covers_a_numbered_place(figures, demo_trial):
    plan = plan_briefing(demo_trial)
    map_pages = [figures[1]] + [figures[d.first_page - 1] for d in plan.districts]
    for page_no, fig in zip([2] + [d.first_page for d in plan.districts], map_pages, strict=True):
        markers = _marker_boxes(fig)
        assert markers, f"page {page_no} draws no numbered place"
        _, found = _boxes(fig, LABEL_GIDS + FURNITURE_GIDS)
        assert found["scale-bar"] and found["north-arrow"], f"page {page_no} lacks furniture"
        labels = []
        for gid, items in found.items():
            for ax, artist, box in items:
                b = (box.x0, box.y0, box.x1, box.y1)
                hits = [m for m in markers if _overlap(b, m)]
                assert not hits, f"page {page_no}: a {gid} covers a numbered place"
                # inside the map frame: nothing is clipped at the map's edge
                frame = ax.get_window_extent()
                assert frame.x0 <= b[0] and b[2] <= frame.x1, f"page {page_no}: {gid} clipped"
                assert frame.y0 <= b[1] and b[3] <= frame.y1, f"page {page_no}: {gid} clipped"
                if gid in LABEL_GIDS and artist.get_path_effects() == []:
                    labels.append((gid, artist.get_text(), b))
        # labels do not overlap one another (the halo copy under each is skipped)
        for i, (g1, t1, b1) in enumerate(labels):
            for g2, t2, b2 in labels[i + 1 :]:
                assert not _overlap(b1, b2), f"page {page_no}: {g1} {t1!r} overlaps {g2} {t2!r}"
        street = [a for _, a, _ in found["street-label"]]
        assert all(a.get_fontsize() >= 7 for a in street)  # readable on paper (common practice)
    # Every place of a district is numbered on its map with its number from the plan.
    for d in plan.districts:
        _, found = _boxes(figures[d.first_page - 1], ("place-number",))
        drawn = {int(a.get_text()) for _, a, _ in found["place-number"]}
        assert drawn == set(d.numbers), d.name


def _relative_luminance(colour) -> float:
    """WCAG 2.1 relative luminance (W3C 2018, definition 'relative luminance')."""
    from matplotlib.colors import to_rgb

    c = np.asarray(to_rgb(colour), dtype=float)
    c = np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)
    return float(c @ np.array([0.2126, 0.7152, 0.0722]))


def _contrast(a, b) -> float:
    """WCAG 2.1 contrast ratio (L1 + 0.05) / (L2 + 0.05), lighter over darker."""
    la, lb = sorted((_relative_luminance(a), _relative_luminance(b)), reverse=True)
    return (la + 0.05) / (lb + 0.05)


def test_pack_reads_in_greyscale(figures, demo_trial):
    # Worked values of the WCAG formula: black on white is 21:1, white on white 1:1.
    assert _contrast("black", "white") == pytest.approx(21.0)
    assert _contrast("white", "white") == pytest.approx(1.0)
    plan = plan_briefing(demo_trial)
    for d in plan.districts:
        ax = figures[d.first_page - 1].axes[0]
        treated = [c for c in ax.collections if c.get_gid() == "treated"]
        context = [c for c in ax.collections if c.get_gid() == "context"]
        assert treated and context
        # the treated places' darkest stroke (their casing), against streets and paper
        darkest = min(
            (tuple(rgba[:3]) for c in treated for rgba in c.get_colors()), key=_relative_luminance
        )
        grey = tuple(context[0].get_colors()[0][:3])
        # WCAG 2.1 success criterion 1.4.11 (non-text contrast): at least 3:1 for the
        # graphics needed to read a map, here a treated place against streets and paper.
        assert _contrast(darkest, grey) >= 3.0, d.name
        assert _contrast(darkest, "white") >= 3.0, d.name
        # the context streets stay visible on paper without competing with the places
        assert 1.5 <= _contrast(grey, "white") < _contrast(darkest, "white")


def test_shared_district_borders_are_drawn_once(figures, region):
    # Reference: shapely's union of the polygons' boundaries has each shared border once.
    boundaries = shapely.boundary(region.districts.geometry.values)
    union_length = shapely.union_all(boundaries).length
    separate_length = shapely.length(boundaries).sum()
    assert separate_length > 1.3 * union_length  # the sample city's districts share borders
    ax = figures[1].axes[0]
    (borders,) = [c for c in ax.collections if c.get_gid() == "districts"]
    drawn = sum(float(np.hypot(*np.diff(seg, axis=0).T).sum()) for seg in borders.get_segments())
    assert drawn == pytest.approx(union_length, rel=1e-6)


def test_cover_and_timestamps_for_field_staff(packs):
    text = run(poppler("pdftotext"), "-layout", str(packs["a4"]), "-")
    assert "+00:00" not in text  # times print as people read them, not as ISO 8601
    assert not re.search(r"\d{4}-\d\d-\d\dT\d\d:", text)
    cover = run(poppler("pdftotext"), "-layout", "-f", "1", "-l", "1", str(packs["a4"]), "-")
    # no city-wide counts of comparison groups on the cover
    assert "spillover" not in cover.lower() and "pure control" not in cover.lower()
    assert "Treated places in this pack: 40" in cover


def test_visit_log_sheet_per_district(packs, demo_trial):
    plan = plan_briefing(demo_trial)
    for d in plan.districts:
        last = d.first_page + d.n_pages - 1
        tokens = pdf_tokens(packs["a4"], last)
        assert {"Visit", "log:", "Date", "Time", "in", "out", "Officer", "Notes"} <= tokens
        assert {str(n) for n in d.numbers} <= tokens


def test_command_line_districts_option(demo_trial, region, tmp_path):
    from typer.testing import CliRunner

    from geoexp.cli import app

    polygons = tmp_path / "districts.gpkg"
    region.districts.to_file(polygons, engine="pyogrio")
    out = tmp_path / "pack.pdf"
    result = CliRunner().invoke(
        app, ["briefing", str(demo_trial), "--out", str(out), "--districts", str(polygons)]
    )
    assert result.exit_code == 0, result.output
    assert pdf_pages(out) == plan_briefing(demo_trial).n_pages
    missing = CliRunner().invoke(
        app, ["briefing", str(demo_trial), "--out", str(out), "--districts", "nowhere.gpkg"]
    )
    assert missing.exit_code == 2 and "nowhere.gpkg" in missing.output
