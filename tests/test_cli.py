"""The command line: every command has help, errors are messages with exit status 2."""

from __future__ import annotations

import subprocess
import sys

import pytest
from typer.testing import CliRunner

from geoexp.cli import app

COMMANDS = [
    "draw",
    "check",
    "export",
    "sample-region",
    "demo",
    "count",
    "load-counts",
    "analyse",
    "power",
    "map",
    "briefing",
    "baseline",
    "write-tables",
    "field-list",
]


@pytest.mark.parametrize("command", COMMANDS)
def test_every_command_has_help(command):
    result = CliRunner().invoke(app, [command, "--help"])
    assert result.exit_code == 0
    assert "Usage" in result.output


def run(*args):
    return subprocess.run(
        [sys.executable, "-c", "from geoexp.cli import main; main()", *args],
        capture_output=True,
        text=True,
    )


def test_draw_check_export_and_lock(tmp_path, demo_outputs):
    spec = demo_outputs["spec"]
    trial = tmp_path / "t.gpkg"
    first = run(
        "draw", str(spec), "--trial", str(trial), "--draws", "200", "--csv", str(tmp_path / "f.csv")
    )
    assert first.returncode == 0, first.stderr
    assert "locked" in first.stdout
    again = run("draw", str(spec), "--trial", str(trial), "--draws", "200")
    assert again.returncode == 2
    assert "replace" in again.stderr and "Traceback" not in again.stderr
    replaced = run(
        "draw",
        str(spec),
        "--trial",
        str(trial),
        "--draws",
        "200",
        "--replace",
        "--reason",
        "testing",
    )
    assert replaced.returncode == 0, replaced.stderr
    checked = run("check", str(spec), "--draws", "200")
    assert checked.returncode == 0 and "Verdict" in checked.stdout
    exported = run("export", str(trial), "--csv", str(tmp_path / "e.csv"))
    assert exported.returncode == 0 and (tmp_path / "e.csv").exists()


def test_bad_input_is_a_message_not_a_traceback(tmp_path):
    result = run("check", str(tmp_path / "missing.toml"))
    assert result.returncode == 2
    assert "missing.toml" in result.stderr and "Traceback" not in result.stderr


def test_ready_counts_table(tmp_path, demo_outputs):
    import shutil

    import pandas as pd

    from geoexp.trialfile import TrialFile

    trial = tmp_path / "t.gpkg"
    shutil.copy(demo_outputs["trial"], trial)
    stored = TrialFile.open(trial).read("outcomes")
    stored[["pre", "post"]].rename_axis("seg").reset_index().to_csv(tmp_path / "c.csv", index=False)
    args = [
        "load-counts",
        str(trial),
        "--table",
        str(tmp_path / "c.csv"),
        "--pre",
        "2025-01-01:2025-12-31",
        "--post",
        "2026-01-01:2026-12-31",
    ]
    ok = run(*args, "--id-column", "seg")
    assert ok.returncode == 0, ok.stderr
    again = TrialFile.open(trial).read("outcomes")
    pd.testing.assert_series_equal(again["post"], stored["post"], check_dtype=False)
    bad = run(*args, "--id-column", "nope")
    assert bad.returncode == 2 and "nope" in bad.stderr and "Traceback" not in bad.stderr


def test_analyse_counts_with_the_date_format_given(tmp_path, demo_outputs):
    import shutil

    import pandas as pd

    trial = tmp_path / "t.gpkg"
    shutil.copy(demo_outputs["trial"], trial)
    incidents = pd.read_csv(demo_outputs["incidents"], dtype=str)
    # Day first, as many agencies export: 2025-03-04 is written 04/03/2025.
    incidents["date"] = pd.to_datetime(incidents["date"]).dt.strftime("%d/%m/%Y")
    path = tmp_path / "dmy.csv"
    incidents.to_csv(path, index=False)
    args = [
        "analyse", str(trial), "--incidents", str(path), "--lon", "lon", "--lat", "lat",
        "--pre", "2025-01-01:2025-12-31", "--post", "2026-01-01:2026-12-31",
        "--draws", "50", "--report", str(tmp_path / "r.html"),
    ]  # fmt: skip
    refused = CliRunner().invoke(app, args)
    assert refused.exit_code == 2 and "--date-format" in refused.output
    done = CliRunner().invoke(app, [*args, "--date-format", "dmy"])
    assert done.exit_code == 0, done.output
    assert (tmp_path / "r.html").exists() and (tmp_path / "r.md").exists()
    assert (tmp_path / "r_results_map.html").exists()
    # the report's section over time reads the day-first dates as the count did
    assert "## Over time" in (tmp_path / "r.md").read_text(encoding="utf-8")
    # The same incidents counted from ISO dates give the same stored counts.
    from geoexp.trialfile import TrialFile

    stored = TrialFile.open(trial).read("outcomes")
    expected = TrialFile.open(demo_outputs["trial"]).read("outcomes")
    pd.testing.assert_series_equal(stored["post"], expected["post"])


def test_every_command_that_counts_passes_on_every_reading_option():
    # The bug this guards against: 'analyse --incidents' once dropped --date-format on its way
    # to counting. Both commands build the same ObservedIncidents from their own parameters.
    import inspect

    from geoexp.cli._app import _observed_incidents, analyse_command, count_command

    passed = ("date_column", "date_format", "lon", "lat", "x", "y", "crs")
    for command in (count_command, analyse_command):
        options = {name: f"{name} given" for name in inspect.signature(command).parameters}
        options.update(type_column="kind", types="burglary,theft", tolerance=12.5)
        observed = _observed_incidents("in.csv", (("a", "b"), ("c", "d")), options)
        for name in passed:
            assert getattr(observed, name) == f"{name} given", (command.__name__, name)
        assert observed.tolerance_m == 12.5 and observed.type_column == "kind"
        assert observed.by_type and observed.keep_types == ("burglary", "theft")
        assert (observed.pre, observed.post) == (("a", "b"), ("c", "d"))


def test_analyse_over_time_by_week(tmp_path, demo_outputs):
    import shutil

    trial = tmp_path / "t.gpkg"
    shutil.copy(demo_outputs["trial"], trial)
    args = [
        "analyse", str(trial), "--incidents", str(demo_outputs["incidents"]),
        "--lon", "lon", "--lat", "lat",
        "--pre", "2025-01-01:2025-12-31", "--post", "2026-01-01:2026-12-31",
        "--test-draws", "50", "--report", str(tmp_path / "r.html"), "--over-time", "week",
    ]  # fmt: skip
    done = CliRunner().invoke(app, args)
    assert done.exit_code == 0, done.output
    md = (tmp_path / "r.md").read_text(encoding="utf-8")
    assert "incidents per unit per week" in md and "per month" not in md
    bad = CliRunner().invoke(app, [*args[:-1], "fortnight"])
    assert bad.exit_code == 2 and "--over-time" in bad.output
