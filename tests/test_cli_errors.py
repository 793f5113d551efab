"""Bad input through the command line: a message and exit status 2, never a traceback.

Families: outputs that would overwrite the trial or an input; outputs naming a
folder or lying under a file; bad option values; unreadable inputs; counting
where (nearly) every incident is dropped; user text with console markup;
replacing a locked assignment without a reason; an unexpected defect (exit 1,
one line, a log file). Where a file could have been damaged, its bytes are
checked unchanged.
"""

from __future__ import annotations

import hashlib
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
from typer.testing import CliRunner

from geoexp.cli import app

PRE = "2025-01-01:2025-12-31"
POST = "2026-01-01:2026-12-31"


def invoke(*args):
    return CliRunner().invoke(app, [str(a) for a in args])


def digest(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def assert_refused(result, *words):
    assert result.exit_code == 2, (result.exit_code, result.output, result.exception)
    text = " ".join(result.output.split())
    assert "Traceback" not in text
    for word in words:
        assert word.lower() in text.lower(), (word, text)


@pytest.fixture(scope="module")
def files(demo_outputs, tmp_path_factory):
    """Read-only inputs: the demo's spec and trial, and a small incidents extract."""
    root = tmp_path_factory.mktemp("cli_inputs")
    incidents = pd.read_csv(demo_outputs["incidents"], dtype=str)
    dates = incidents["date"]
    small = pd.concat(
        [
            incidents[dates.str.startswith("2025")].iloc[::40],
            incidents[dates.str.startswith("2026")].iloc[::40],
        ]
    )
    small_path = root / "incidents.csv"
    small.to_csv(small_path, index=False)
    return {
        "spec": Path(demo_outputs["spec"]),
        "trial": Path(demo_outputs["trial"]),
        "incidents": small_path,
        "frame": small,
        "root": root,
    }


@pytest.fixture
def trial(files, tmp_path):
    """A copy of the demo trial that a test may try to damage."""
    path = tmp_path / "trial.gpkg"
    shutil.copy(files["trial"], path)
    return path


# ------------------------------------------------------------ output overwrites


def renamed(trial: Path, name: str) -> Path:
    """A copy of the trial under another name in the same folder."""
    path = trial.with_name(name)
    shutil.copy(trial, path)
    return path


def overwrite_cases():
    # (name, build args from (trial, files, tmp), the file that must stay unchanged, words)
    return [
        ("analyse-report-trial", lambda t, f, d: ["analyse", t, "--report", t], "trial", "--report"),
        (
            "analyse-report-md-twin-trial",
            lambda t, f, d: ["analyse", renamed(t, "study.md"), "--report", d / "study.html"],
            "study.md",
            "markdown twin",
        ),
        (
            "analyse-report-map-trial",
            lambda t, f, d: ["analyse", renamed(t, "r_results_map.html"), "--report", d / "r.html"],
            "r_results_map.html",
            "results map",
        ),
        ("export-csv-trial", lambda t, f, d: ["export", t, "--csv", t], "trial", "--csv"),
        ("map-out-trial", lambda t, f, d: ["map", t, "--out", t], "trial", "--out"),
        ("briefing-out-trial", lambda t, f, d: ["briefing", t, "--out", t], "trial", "--out"),
        (
            "check-markdown-spec",
            lambda t, f, d: ["check", f["spec"], "--markdown", f["spec"]],
            "spec",
            "--markdown",
        ),
        ("sample-region-out-trial", lambda t, f, d: ["sample-region", "--out", t], "trial", "trial"),
        (
            "draw-csv-spec",
            lambda t, f, d: ["draw", f["spec"], "--trial", d / "new.gpkg", "--csv", f["spec"]],
            "spec",
            "--csv",
        ),
        (
            "draw-csv-trial",
            lambda t, f, d: ["draw", f["spec"], "--trial", d / "new.gpkg", "--csv", d / "new.gpkg"],
            None,
            "same file",
        ),
        (
            "draw-trial-spec",
            lambda t, f, d: ["draw", f["spec"], "--trial", f["spec"], "--replace", "--reason", "x"],
            "spec",
            "--trial",
        ),
        (
            "count-dropped-trial",
            lambda t, f, d: [
                "count", t, "--incidents", f["incidents"], "--lon", "lon", "--lat", "lat",
                "--pre", PRE, "--post", POST, "--dropped", t,
            ],
            "trial",
            "--dropped",
        ),
        (
            "count-dropped-incidents",
            lambda t, f, d: [
                "count", t, "--incidents", f["incidents"], "--lon", "lon", "--lat", "lat",
                "--pre", PRE, "--post", POST, "--dropped", f["incidents"],
            ],
            "incidents",
            "--incidents",
        ),
        (
            "analyse-report-incidents",
            lambda t, f, d: [
                "analyse", t, "--incidents", f["incidents"], "--lon", "lon", "--lat", "lat",
                "--pre", PRE, "--post", POST, "--report", f["incidents"],
            ],
            "incidents",
            "--report",
        ),
    ]  # fmt: skip


@pytest.mark.parametrize(
    "build,keep,word", [c[1:] for c in overwrite_cases()], ids=[c[0] for c in overwrite_cases()]
)
def test_output_never_overwrites_the_trial_or_an_input(build, keep, word, trial, files, tmp_path):
    guarded = {"trial": trial, "spec": files["spec"], "incidents": files["incidents"], None: trial}
    args = build(trial, files, tmp_path)
    kept = guarded.get(keep, tmp_path / str(keep))
    before = digest(kept if kept.exists() else trial)
    result = invoke(*args)
    assert_refused(result, word)
    assert digest(kept) == before


@pytest.mark.parametrize("kind", ["symlink", "hardlink", "symlink-to-symlink"])
def test_output_through_a_link_to_the_trial_is_refused(kind, trial, tmp_path):
    link = tmp_path / "other_name.gpkg"
    if kind == "hardlink":
        os.link(trial, link)
    elif kind == "symlink":
        link.symlink_to(trial)
    else:
        (tmp_path / "hop.gpkg").symlink_to(trial)
        link.symlink_to(tmp_path / "hop.gpkg")
    before = digest(trial)
    assert_refused(invoke("export", trial, "--csv", link), "--csv", "trial file")
    assert digest(trial) == before


# ------------------------------------------- outputs that name a folder or a file's child


def output_cases():
    # each: command args with OUT where the output goes
    return {
        "draw --csv": lambda f, t, d, out: ["draw", f["spec"], "--trial", d / "n.gpkg", "--csv", out],
        "draw --trial": lambda f, t, d, out: ["draw", f["spec"], "--trial", out],
        "check --markdown": lambda f, t, d, out: ["check", f["spec"], "--markdown", out],
        "export --csv": lambda f, t, d, out: ["export", t, "--csv", out],
        "sample-region --out": lambda f, t, d, out: ["sample-region", "--out", out],
        "map --out": lambda f, t, d, out: ["map", t, "--out", out],
        "briefing --out": lambda f, t, d, out: ["briefing", t, "--out", out],
        "analyse --report": lambda f, t, d, out: ["analyse", t, "--report", out],
        "count --dropped": lambda f, t, d, out: [
            "count", t, "--incidents", f["incidents"], "--lon", "lon", "--lat", "lat",
            "--pre", PRE, "--post", POST, "--dropped", out,
        ],
    }  # fmt: skip


@pytest.mark.parametrize("where", ["folder", "under-a-file"])
@pytest.mark.parametrize("command", list(output_cases()))
def test_output_must_be_a_writable_file_name(command, where, files, trial, tmp_path):
    blocker = tmp_path / "plain.txt"
    blocker.write_text("not a folder", encoding="utf-8")
    if where == "folder":
        out = tmp_path / "a_folder.out"
        out.mkdir()
        words = ["folder"]
    else:
        out = blocker / "out.html"
        words = ["is a file, not a folder"]
    before = digest(trial)
    result = invoke(*output_cases()[command](files, trial, tmp_path, out))
    assert_refused(result, command.split()[1], *words)
    assert digest(trial) == before
    assert blocker.read_text(encoding="utf-8") == "not a folder"


def test_demo_folder_that_is_a_file_is_refused(tmp_path):
    plain = tmp_path / "demo"
    plain.write_text("x", encoding="utf-8")
    assert_refused(invoke("demo", "--out", plain, "--draws", "10"), "--out", "is a file")
    assert plain.read_text(encoding="utf-8") == "x"


# ------------------------------------------------------------ bad option values


def option_cases():
    s, t = "SPEC", "TRIAL"
    count = ["count", t, "--incidents", "INC", "--lon", "lon", "--lat", "lat"]
    return [
        (["analyse", t, "--level", "1.5"], "--level"),
        (["analyse", t, "--level", "0"], "--level"),
        (["analyse", t, "--level", "1"], "--level"),
        (["analyse", t, "--level", "-0.9"], "--level"),
        (["analyse", t, "--level", "nan"], "--level"),
        (["analyse", t, "--draws", "0"], "--draws"),
        (["analyse", t, "--draws", "-3"], "--draws"),
        (["analyse", t, "--draws", "1000000000"], "--draws"),
        (["analyse", t, "--draws", "many"], "--draws"),
        (["analyse", t, "--outcome", "ratio"], "--outcome"),
        (["analyse", t, "--estimator", "ols"], "--estimator"),
        (["analyse", t, "--tolerance", "-5"], "--tolerance"),
        (["check", s, "--draws", "0"], "--draws"),
        (["draw", s, "--trial", "NEW", "--draws", "-1"], "--draws"),
        (["power", s, "--draws", "0"], "--draws"),
        (["power", s, "--sims", "0"], "--sims"),
        (["power", s, "--alpha", "1.5"], "--alpha"),
        (["power", s, "--dispersion", "-1"], "--dispersion"),
        (["power", s, "--dispersion", "inf"], "--dispersion"),
        (["power", s, "--rate-ratio", "treated=abc"], "--rate-ratio"),
        (["power", s, "--rate-ratio", "treated=-1"], "--rate-ratio"),
        (["power", s, "--outcome", "ratio"], "--outcome"),
        (["demo", "--draws", "0"], "--draws"),
        (["sample-region", "--out", "NEW", "--seed", "-1"], "--seed"),
        (["briefing", t, "--paper", "a3"], "--paper"),
        ([*count, "--pre", PRE, "--post", POST, "--tolerance", "0"], "--tolerance"),
        ([*count, "--pre", PRE, "--post", POST, "--tolerance", "-1"], "--tolerance"),
        ([*count, "--pre", PRE, "--post", POST, "--tolerance", "nan"], "--tolerance"),
        ([*count, "--pre", PRE, "--post", POST, "--tolerance", "inf"], "--tolerance"),
        ([*count, "--pre", PRE, "--post", POST, "--allow-dropped", "1.5"], "--allow-dropped"),
        ([*count, "--pre", "2025", "--post", POST], "--pre"),
        ([*count, "--pre", PRE, "--post", "2026-01-01:"], "--post"),
        ([*count, "--pre", "2025-01-01:2025-13-45", "--post", POST], "not a calendar date"),
        ([*count, "--pre", POST, "--post", PRE], "swap"),
        ([*count, "--pre", "2025-01-01:2026-06-30", "--post", POST], "overlap"),
        (["analyse", t, "--incidents", "INC", "--pre", PRE], "--pre and --post"),
    ]


@pytest.mark.parametrize(
    "args,word", option_cases(), ids=[" ".join(a[:1] + a[-2:]) for a, _ in option_cases()]
)
def test_bad_option_values_are_refused(args, word, files, trial, tmp_path):
    names = {
        "SPEC": files["spec"],
        "TRIAL": trial,
        "INC": files["incidents"],
        "NEW": tmp_path / "new.gpkg",
    }
    before = digest(trial)
    result = invoke(*[names.get(a, a) for a in args])
    assert_refused(result, word)
    assert digest(trial) == before
    assert not (tmp_path / "new.gpkg").exists()


def test_replace_without_a_reason_is_refused_before_any_work(files, trial):
    before = digest(trial)
    for extra in ([], ["--reason", "   "]):
        result = invoke("draw", files["spec"], "--trial", trial, "--replace", *extra)
        assert_refused(result, "--reason")
    assert digest(trial) == before


# ------------------------------------------------------------ unreadable inputs


def bad_file(kind: str, folder: Path, suffix: str) -> Path:
    path = folder / f"input_{kind}{suffix}"
    if kind == "missing":
        return path
    if kind == "folder":
        path.mkdir()
    elif kind == "binary":
        path.write_bytes(b"\x00\x01\x02GPKG\xff\xfe" * 20)
    elif kind == "non-utf8":
        path.write_bytes("name = 'Pr\xe9fecture'\nunit_id,pre,post\n".encode("latin-1"))
    elif kind == "empty":
        path.write_bytes(b"")
    elif kind == "header-only":
        path.write_text("unit_id,pre,post\n", encoding="utf-8")
    return path


SPEC_FAILURES = {
    "missing": "does not exist",
    "folder": "folder",
    "binary": "binary",
    "non-utf8": "utf-8",
}
COUNTS_FAILURES = {**SPEC_FAILURES, "empty": "empty", "header-only": "no rows"}


@pytest.mark.parametrize("command", ["check", "draw", "power", "map"])
@pytest.mark.parametrize("kind", list(SPEC_FAILURES))
def test_unreadable_spec(command, kind, tmp_path):
    spec = bad_file(kind, tmp_path, ".toml")
    args = {
        "check": ["check", spec],
        "draw": ["draw", spec, "--trial", tmp_path / "t.gpkg"],
        "power": ["power", spec],
        "map": ["map", spec, "--draw-only", "--out", tmp_path / "m.html"],
    }[command]
    assert_refused(invoke(*args), spec.name, SPEC_FAILURES[kind])
    assert not (tmp_path / "t.gpkg").exists() and not (tmp_path / "m.html").exists()


@pytest.mark.parametrize("kind", list(COUNTS_FAILURES))
def test_unreadable_counts_table(kind, trial, tmp_path):
    table = bad_file(kind, tmp_path, ".csv")
    before = digest(trial)
    result = invoke("load-counts", trial, "--table", table, "--pre", PRE, "--post", POST)
    assert_refused(result, table.name, COUNTS_FAILURES[kind])
    assert digest(trial) == before


@pytest.mark.parametrize("kind", ["missing", "folder", "non-utf8", "empty"])
def test_unreadable_incidents(kind, trial, tmp_path):
    incidents = bad_file(kind, tmp_path, ".csv")
    before = digest(trial)
    result = invoke(
        "count", trial, "--incidents", incidents, "--lon", "lon", "--lat", "lat",
        "--pre", PRE, "--post", POST,
    )  # fmt: skip
    assert_refused(result, incidents.name)
    assert digest(trial) == before


@pytest.mark.parametrize("kind", ["missing", "folder", "not-a-trial"])
@pytest.mark.parametrize("command", ["export", "briefing", "analyse"])
def test_unreadable_trial(kind, command, tmp_path):
    path = tmp_path / "t.gpkg"
    if kind == "folder":
        path.mkdir()
    elif kind == "not-a-trial":
        path.write_text("hello", encoding="utf-8")
    outputs = {
        "export": ["--csv", tmp_path / "o.csv"],
        "briefing": ["--out", tmp_path / "b.pdf"],
        "analyse": ["--report", tmp_path / "r.html"],
    }
    result = invoke(command, path, *outputs[command])
    assert_refused(result, "t.gpkg")
    assert not any((tmp_path / n).exists() for n in ("o.csv", "b.pdf", "r.html"))


# ------------------------------------------- counting where every incident is dropped


def dropped_case(name: str, frame: pd.DataFrame, folder: Path) -> tuple[Path, list[str], list[str]]:
    path = folder / f"{name}.csv"
    options = ["--lon", "lon", "--lat", "lat"]
    words = ["read", "dropped"]
    periods = ["--pre", PRE, "--post", POST]
    if name == "swapped-lon-lat":
        frame = frame.rename(columns={"lon": "lat", "lat": "lon"})
        words += ["outside the units' extent", "swapped"]
    elif name == "wrong-crs":
        options = ["--x", "lon", "--y", "lat", "--crs", "EPSG:32633"]
        words += ["outside the units' extent", "CRS"]
    elif name == "empty-period":
        periods = ["--pre", "2030-01-01:2030-12-31", "--post", "2031-01-01:2031-12-31"]
        words = ["pre-period", "2030-01-01", "dated"]
    elif name == "non-numeric-coordinates":
        frame = frame.assign(lon="east", lat="north")
        words += ["coordinates"]
    elif name == "header-only":
        frame = frame.iloc[:0]
        words = ["no incidents"]
    elif name == "most-outside-periods":
        frame = frame.assign(
            date=["2019-06-01"] * (len(frame) - 3) + ["2025-06-01", "2026-06-01", "2026-06-02"]
        )
        words += ["outside both periods", "--allow-dropped"]
    frame.to_csv(path, index=False)
    return path, [*options, *periods], words


DROPPED = [
    "swapped-lon-lat",
    "wrong-crs",
    "empty-period",
    "non-numeric-coordinates",
    "header-only",
    "most-outside-periods",
]


@pytest.mark.parametrize("command", ["count", "analyse"])
@pytest.mark.parametrize("name", DROPPED)
def test_counting_stops_when_incidents_are_dropped(name, command, files, trial, tmp_path):
    path, options, words = dropped_case(name, files["frame"], tmp_path)
    before = digest(trial)
    extra = ["--dropped", tmp_path / "dropped.csv"] if command == "count" else []
    extra += ["--report", tmp_path / "r.html"] if command == "analyse" else []
    result = invoke(command, trial, "--incidents", path, *options, *extra)
    assert_refused(result, *words)
    assert digest(trial) == before  # the good outcomes stay
    assert not (tmp_path / "dropped.csv").exists() and not (tmp_path / "r.html").exists()


def test_allow_dropped_overrides_knowingly_and_is_recorded(files, trial, tmp_path):
    path, options, _ = dropped_case("most-outside-periods", files["frame"], tmp_path)
    result = invoke("count", trial, "--incidents", path, *options, "--allow-dropped", "1")
    assert result.exit_code == 0, result.output
    assert "set to 100%" in " ".join(result.output.split())
    from geoexp.trialfile import TrialFile

    assert TrialFile.open(trial).meta["outcomes_max_dropped_share"] == "1.0"


# ------------------------------------------------------------ user text is text


@pytest.fixture
def marked_spec(files, tmp_path):
    from geoexp.design import DesignSpec

    spec = DesignSpec.from_toml(files["spec"])
    for zone in spec.eligible.exclude:
        shutil.copy(spec.resolve(zone), tmp_path / Path(zone).name)
    name = "Night patrols [/pilot] [bold]east[/bold] :smile:"
    path = tmp_path / "marked.toml"
    spec.replace(name=name).to_toml(path)
    return path, name


def test_spec_name_with_markup_prints_literally(marked_spec):
    path, name = marked_spec
    result = invoke("check", path, "--draws", "20")
    assert result.exit_code == 0, result.output
    assert name in result.output


def test_markup_in_an_error_message_prints_literally(trial, tmp_path):
    missing = tmp_path / "[units] [bold]incidents[/bold].csv"
    result = invoke(
        "count", trial, "--incidents", missing, "--lon", "lon", "--lat", "lat",
        "--pre", PRE, "--post", POST,
    )  # fmt: skip
    assert_refused(result, "[units] [bold]incidents[/bold].csv")


# ------------------------------------------------------- unexpected failures


def test_unexpected_failure_is_one_line_and_a_log(monkeypatch, trial, tmp_path):
    import geoexp.trialfile

    def broken(*args, **kwargs):
        raise RuntimeError("simulated defect")

    monkeypatch.setattr(geoexp.trialfile, "export_assignment_csv", broken)
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    result = invoke("export", trial, "--csv", tmp_path / "o.csv")
    assert result.exit_code == 1
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1, lines
    assert "geoexp failed unexpectedly: RuntimeError: simulated defect" in lines[0]
    logs = list((tmp_path / "cache").rglob("*.log"))
    assert len(logs) == 1 and str(logs[0]) in lines[0]
    text = logs[0].read_text(encoding="utf-8")
    assert "Traceback" in text and "simulated defect" in text


def test_write_that_fails_names_the_file_and_the_reason(monkeypatch, trial, tmp_path):
    import errno

    import geoexp.trialfile

    def full_disk(*args, **kwargs):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(geoexp.trialfile, "export_assignment_csv", full_disk)
    result = invoke("export", trial, "--csv", tmp_path / "o.csv")
    assert_refused(result, "o.csv", os.strerror(errno.ENOSPC), "free some space")


def test_the_entry_point_turns_a_bad_spec_into_status_2(tmp_path):
    spec = bad_file("non-utf8", tmp_path, ".toml")
    result = subprocess.run(
        [sys.executable, "-c", "from geoexp.cli import main; main()", "check", str(spec)],
        capture_output=True,
        text=True,
    )
    assert result.returncode == 2, result.stderr
    assert "utf-8" in result.stderr.lower() and "Traceback" not in result.stderr
