"""Planning figures: written by the demo, by `check --figures` and by `power --curve --figures`."""

from __future__ import annotations

import re
import subprocess
import sys

import numpy as np
from matplotlib.image import imread

FIGURES = {
    "design_check_probability.png",
    "design_check_balance.png",
    "design_check_flow.png",
    "power_curve.png",
}


def run(*args):
    return subprocess.run(
        [sys.executable, "-c", "from geoexp.cli import main; main()", *args],
        capture_output=True,
        text=True,
    )


def _drawn(path) -> bool:
    """A PNG that decodes and is not one flat colour."""
    pixels = imread(path)
    return pixels.ndim == 3 and min(pixels.shape[:2]) > 100 and float(np.ptp(pixels)) > 0.5


def test_demo_writes_every_planning_figure(demo_outputs):
    names = {p.name for p in demo_outputs["figures"]}
    assert names == FIGURES
    for path in demo_outputs["figures"]:
        assert path.stat().st_size > 5_000 and _drawn(path), path


def test_check_saves_and_lists_its_figures(demo_outputs, tmp_path):
    folder = tmp_path / "figs"
    done = run("check", str(demo_outputs["spec"]), "--draws", "200", "--figures", str(folder))
    assert done.returncode == 0, done.stderr
    listed = re.findall(r"^\s+(\S+\.png)$", done.stdout, re.M)
    assert sorted(listed) == sorted(str(folder / n) for n in FIGURES if n.startswith("design"))
    assert all(_drawn(p) for p in listed)
    # The printed flow adds up: eligible = all less each step's removed units.
    flow = dict(re.findall(r"^\s+([^:\n]+): ([\d,]+) units", done.stdout, re.M))
    removed = [int(n.replace(",", "")) for n in re.findall(r"\(([\d,]+) removed\)", done.stdout)]
    n_all = int(flow["All units in the layer"].replace(",", ""))
    assert n_all - sum(removed) == int(flow["Hot spots (eligible)"].replace(",", "")) == 150


def test_power_curve_from_the_command_line(demo_outputs, tmp_path):
    args = ["power", str(demo_outputs["spec"]), "--rate-ratio", "treated=0.6"]
    args += ["--baseline-column", "incidents_y1", "--simulated-trials", "20"]
    args += ["--test-draws", "20", "--curve", "--curve-ratio", "0.9"]
    args += ["--curve-treated", "20", "--figures", str(tmp_path)]
    done = run(*args)
    assert done.returncode == 0, done.stderr
    out = done.stdout
    own = float(re.search(r"^treated vs pure control\s+([\d.]+)", out, re.M).group(1))
    row = re.search(r"^0\.6\s+([\d.]+)\s+([\d.]+)$", out, re.M)
    # The curve's point at the design's own number treated (40, the second column) and the
    # planted ratio is the run the power table printed above it.
    assert float(row.group(2)) == own
    assert "Minimum detectable effect with 40 treated units" in out
    assert "Required number treated for rate ratio 0.6" in out
    if own < 0.8:
        assert "Warning: underpowered: treated vs pure control" in out
    assert _drawn(tmp_path / "power_curve.png")
    assert f"Figure: {tmp_path / 'power_curve.png'}" in out
    refused = run(
        "power",
        str(demo_outputs["spec"]),
        "--baseline-column",
        "incidents_y1",
        "--figures",
        str(tmp_path),
    )
    assert refused.returncode == 2 and "--curve" in refused.stderr
