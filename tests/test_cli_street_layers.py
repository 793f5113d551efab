"""A whole command-line run on a street layer as it comes: planar, no id column, undated baseline."""

from __future__ import annotations

import os
import subprocess
import sys
import warnings
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import shapely

from geoexp.trialfile import TrialFile

# The commands run in the test's folder; this checkout's package comes first on the path.
ROOT = Path(__file__).resolve().parents[1]


def run(*args, cwd):
    env = {
        **os.environ,
        "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]),
    }
    return subprocess.run(
        [sys.executable, "-c", "from geoexp.cli import main; main()", *args],
        capture_output=True,
        text=True,
        cwd=cwd,
        env=env,
    )


def _layer_and_incidents(folder):
    """A 10 x 10 street grid whose streets cross without shared ends, in local metres, no ids."""
    lines = []
    far = 9 * 100 + 50
    for j in range(10):
        for a in np.arange(-50.0, far, 200.0):
            lines.append(shapely.LineString([(a, 100 * j), (min(a + 200, far), 100 * j)]))
            lines.append(shapely.LineString([(100 * j, a), (100 * j, min(a + 200, far))]))
    frame = gpd.GeoDataFrame(
        {"district": ["north" if k % 2 else "south" for k in range(len(lines))]},
        geometry=lines,
        crs=None,
    )
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="'crs' was not provided")
        frame.to_file(folder / "streets.gpkg", layer="streets", engine="pyogrio")
    rng = np.random.default_rng(8)
    n = 2500
    which = rng.integers(0, len(lines), n)
    points = shapely.line_interpolate_point(
        np.asarray(lines, dtype=object)[which], rng.random(n), normalized=True
    )
    xy = shapely.get_coordinates(points)
    days = pd.Timestamp("2025-01-01") + pd.to_timedelta(rng.integers(0, 730, n), unit="D")
    pd.DataFrame(
        {
            "x": xy[:, 0] + 1.0,
            "y": xy[:, 1],
            "date": days.strftime("%Y-%m-%d"),
            "kind": rng.choice(["theft", "assault"], n),
        }
    ).to_csv(folder / "incidents.csv", index=False)
    # an undated extract of the year before, for the baseline
    pd.DataFrame({"x": xy[:800, 0], "y": xy[:800, 1]}).to_csv(folder / "last_year.csv", index=False)
    return len(lines)


SPEC = """
name = "Grid streets, local coordinates"
seed = 5
draws = 200

[units]
path = "counted.gpkg"
planar = "m"
number_rows = true

[eligible]
top_column = "incidents_before"
top_k = 40

[assignment]
method = "complete"
treated = 10

[exposure]
bands_m = [100, 200]
metric = "network"
split_at_crossings = true
snap_tolerance_m = 1.0

[field]
district_column = "district"
"""


def test_planar_layer_without_ids_end_to_end(tmp_path):
    n_units = _layer_and_incidents(tmp_path)
    counted = run(
        "baseline",
        "streets.gpkg",
        "--number-rows",
        "--planar",
        "m",
        "--incidents",
        "last_year.csv",
        "--x",
        "x",
        "--y",
        "y",
        "--crs",
        "planar",
        "--column",
        "incidents_before",
        "--out",
        "counted.gpkg",
        "--tolerance",
        "5",
        cwd=tmp_path,
    )
    assert counted.returncode == 0, counted.stderr
    assert "Counted 800 incidents over all time" in counted.stdout
    layer = pyogrio.read_dataframe(tmp_path / "counted.gpkg")
    assert len(layer) == n_units and layer["incidents_before"].sum() == 800

    (tmp_path / "design.toml").write_text(SPEC, encoding="utf-8")
    check = run("check", "design.toml", cwd=tmp_path)
    assert check.returncode == 0, check.stderr
    assert "local planar coordinates in metres (no CRS)" in check.stdout
    assert "100 crossings" in check.stdout  # 10 x 10 streets, every crossing away from ends
    assert "were split where they cross" in check.stdout

    drawn = run("draw", "design.toml", "--trial", "trial.gpkg", "--csv", "list.csv", cwd=tmp_path)
    assert drawn.returncode == 0, drawn.stderr
    listed = pd.read_csv(tmp_path / "list.csv")
    assert "row" in listed.columns and listed["row"].between(0, n_units - 1).all()

    count = run(
        "count",
        "trial.gpkg",
        "--incidents",
        "incidents.csv",
        "--x",
        "x",
        "--y",
        "y",
        "--crs",
        "planar",
        "--pre",
        "2025-01-01:2025-12-31",
        "--post",
        "2026-01-01:2026-12-31",
        "--tolerance",
        "5",
        cwd=tmp_path,
    )
    assert count.returncode == 0, count.stderr
    assert "2,500 were counted and 0 dropped" in count.stdout

    analysed = run(
        "analyse", "trial.gpkg", "--report", "report.html", "--draws", "100", cwd=tmp_path
    )
    assert analysed.returncode == 0, analysed.stderr
    assert "no interactive results map" in analysed.stdout
    assert not (tmp_path / "report_map.html").exists()
    report = (tmp_path / "report.md").read_text(encoding="utf-8")
    assert "local planar coordinates in metres (no CRS)" in report
    assert "100 crossings" in report

    web = run("map", "trial.gpkg", "--out", "plan.html", cwd=tmp_path)
    assert web.returncode == 2
    assert "[units] planar" in web.stderr and not (tmp_path / "plan.html").exists()

    pack = run("briefing", "trial.gpkg", "--out", "pack.pdf", cwd=tmp_path)
    assert pack.returncode == 0, pack.stderr
    assert (tmp_path / "pack.pdf").stat().st_size > 0

    tf = TrialFile.open(tmp_path / "trial.gpkg")
    assert tf.id_column == "row"
    assert tf.network["crossings"] == 100 and tf.network["split_at_crossings"] is True
    outputs = [check.stdout, drawn.stdout, count.stdout, analysed.stdout, report]
    for text in [*outputs, (tmp_path / "list.csv").read_text(encoding="utf-8")]:
        for word in ("EPSG", "UTM", "WGS 84"):
            assert word not in text


def test_baseline_command_mistakes(tmp_path):
    from typer.testing import CliRunner

    from geoexp.cli import app

    _layer_and_incidents(tmp_path)
    frame = pyogrio.read_dataframe(tmp_path / "streets.gpkg")
    frame["segment_id"] = [f"s{k}" for k in range(len(frame))]
    frame.loc[[2, 5], "segment_id"] = "s7"
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="'crs' was not provided")
        frame.to_file(tmp_path / "doubled.gpkg", engine="pyogrio")
    common = ["--incidents", str(tmp_path / "last_year.csv"), "--x", "x", "--y", "y"]
    common += ["--crs", "planar", "--planar", "m", "--out", str(tmp_path / "out.gpkg")]
    runner = CliRunner()
    both = runner.invoke(
        app,
        ["baseline", str(tmp_path / "streets.gpkg"), "--number-rows", "--id-column", "d"] + common,
    )
    assert both.exit_code == 2 and "--number-rows" in both.output
    doubled = runner.invoke(
        app, ["baseline", str(tmp_path / "doubled.gpkg"), "--id-column", "segment_id", *common]
    )
    assert doubled.exit_code == 2
    assert "'s7'" in doubled.output and "more than once" in doubled.output
    taken = runner.invoke(
        app,
        ["baseline", str(tmp_path / "streets.gpkg"), "--number-rows", "--column", "district"]
        + common,
    )
    assert taken.exit_code == 2 and "already has a column 'district'" in taken.output
    assert not (tmp_path / "out.gpkg").exists()
