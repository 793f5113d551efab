"""The command line's words: workflow order, plain option names, messages in options, tables in words.

Checks: ``--help`` lists the commands in the order of the job with one line
each; ``--version``; the renamed command and options still work under their old
names with a note; power needs its baseline column; ``--types`` counts only
some incident types (checked against the same count of a pre-filtered file);
every message a command prints for a bad input names options, never Python
keywords; and what the commands print has headers in words, counts with
thousands separators and plurals that agree with their number.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import pandas as pd
import pytest
from typer.testing import CliRunner

from geoexp.cli import app

PRE = "2025-01-01:2025-12-31"
POST = "2026-01-01:2026-12-31"
PERIODS = ["--pre", PRE, "--post", POST]

WORKFLOW = [
    "sample-region",
    "draw",
    "check",
    "power",
    "map",
    "briefing",
    "export",
    "count",
    "load-counts",
    "analyse",
    "demo",
]


def invoke(*args):
    return CliRunner().invoke(app, [str(a) for a in args])


def words(result) -> str:
    return " ".join(result.output.split())


@pytest.fixture
def trial(demo_outputs, tmp_path):
    path = tmp_path / "trial.gpkg"
    shutil.copy(demo_outputs["trial"], path)
    return path


# ------------------------------------------------------------ order and names


def test_help_lists_commands_in_workflow_order_with_one_line_each():
    result = invoke("--help")
    assert result.exit_code == 0
    lines = result.output.splitlines()
    found = {}
    for i, line in enumerate(lines):
        parts = line.split()
        if line.startswith("  ") and parts and parts[0] in WORKFLOW and parts[0] not in found:
            found[parts[0]] = i
            assert len(parts) > 1, f"{parts[0]} has no description"
    assert list(found) == WORKFLOW  # every command, in the order of the job
    listed = [line.split()[0] for line in lines if line.startswith("  ") and line.split()]
    assert "counts" not in listed  # the old name is hidden


def test_version_prints_the_package_version():
    import geoexp

    result = invoke("--version")
    assert result.exit_code == 0
    assert result.output.strip() == f"geoexp {geoexp.__version__}"


def test_old_command_name_still_works_with_a_note(trial, tmp_path):
    from geoexp.trialfile import TrialFile

    stored = TrialFile.open(trial).read("outcomes")
    table = tmp_path / "c.csv"
    stored[["pre", "post"]].rename_axis("seg").reset_index().to_csv(table, index=False)
    result = invoke("counts", trial, "--table", table, "--id-column", "seg", *PERIODS)
    assert result.exit_code == 0, result.output
    assert "now 'geoexp load-counts'" in " ".join(result.stderr.split())


def test_old_draws_option_still_works_with_a_note(demo_outputs):
    result = invoke("check", demo_outputs["spec"], "--draws", "20")
    assert result.exit_code == 0, result.output
    assert "--design-draws" in result.stderr
    assert "20 Monte Carlo draws" in result.stdout
    new = invoke("check", demo_outputs["spec"], "--design-draws", "20")
    assert new.exit_code == 0 and "now called" not in new.stderr


def test_each_meaning_of_draws_has_its_own_option():
    options = {
        "check": "--design-draws",
        "draw": "--design-draws",
        "analyse": "--test-draws",
        "power": "--test-draws",
    }
    for command, option in options.items():
        shown = invoke(command, "--help").output
        assert option in shown, command
        assert "--draws " not in shown, command  # the old name is hidden
    assert "--simulated-trials" in invoke("power", "--help").output


def test_power_needs_a_baseline_column_and_names_the_choices(demo_outputs):
    result = invoke("power", demo_outputs["spec"])
    assert result.exit_code == 2
    text = words(result)
    assert "--baseline-column" in text and "incidents_y1" in text
    wrong = invoke("power", demo_outputs["spec"], "--baseline-column", "nope")
    assert wrong.exit_code == 2 and "'nope'" in words(wrong)


# ------------------------------------------------------------ incident types


def test_types_count_only_the_types_asked_for(trial, demo_outputs, tmp_path):
    from geoexp.outcomes import load_outcomes

    source = Path(demo_outputs["incidents"])
    common = ["--incidents", source, "--lon", "lon", "--lat", "lat", *PERIODS]
    result = invoke(
        "count", trial, *common, "--type-column", "incident_type", "--types", "burglary, robbery"
    )
    assert result.exit_code == 0, result.output
    text = words(result)
    assert "only incident types burglary, robbery" in text
    assert "burglary:" in text and "robbery:" in text  # the counts per type are printed
    kept = load_outcomes(trial)
    assert kept.kept_types == ("burglary", "robbery") and kept.type_column == "incident_type"
    assert kept.types == ("burglary", "robbery")

    # Outside check: the same count of a file holding only those types (filtered by pandas).
    frame = pd.read_csv(source, dtype=str)
    only = frame[frame["incident_type"].isin(["burglary", "robbery"])]
    filtered = tmp_path / "only.csv"
    only.to_csv(filtered, index=False)
    other = tmp_path / "other.gpkg"
    shutil.copy(demo_outputs["trial"], other)
    plain = invoke(
        "count", other, "--incidents", filtered, "--lon", "lon", "--lat", "lat", *PERIODS
    )
    assert plain.exit_code == 0, plain.output
    reference = load_outcomes(other)
    pd.testing.assert_frame_equal(kept.counts[["pre", "post"]], reference.counts[["pre", "post"]])
    assert kept.drops.other_incident_type == len(frame) - len(only)
    # the choice is said in the analysis too
    analysed = invoke("analyse", trial, "--report", tmp_path / "r.html", "--test-draws", "20")
    assert analysed.exit_code == 0, analysed.output
    assert "only incidents of type burglary, robbery" in words(analysed)
    # per-type columns add up to the totals
    pre_cols = [c for c, _ in kept.type_columns.values()]
    assert (kept.counts[pre_cols].sum(axis=1) == kept.counts["pre"]).all()


def test_type_column_alone_prints_counts_per_type(trial, demo_outputs):
    result = invoke(
        "count", trial, "--incidents", demo_outputs["incidents"], "--lon", "lon", "--lat", "lat",
        *PERIODS, "--type-column", "incident_type",
    )  # fmt: skip
    assert result.exit_code == 0, result.output
    assert "by type (column 'incident_type')" in result.output
    assert "vandalism:" in result.output


@pytest.mark.parametrize(
    "extra,word",
    [
        (["--types", "burglary"], "--type-column"),
        (["--type-column", "incident_type", "--types", "burglary,nonsense"], "'nonsense'"),
        (["--type-column", "incident_type", "--types", " , "], "--types"),
    ],
)
def test_bad_type_filters_are_refused(extra, word, trial, demo_outputs):
    result = invoke(
        "count", trial, "--incidents", demo_outputs["incidents"], "--lon", "lon", "--lat", "lat",
        *PERIODS, *extra,
    )  # fmt: skip
    assert result.exit_code == 2 and word in words(result), result.output


# ------------------------------------------------------------ messages name options

# Python keywords of the library and of the commands' own parameters: a message that a
# user reads on the command line must not tell them to pass one of these.
PYTHON_WORDS = re.compile(
    # keyword=, as in pre= or date_format= (not CONDITION=NUMBER values such as treated=0.8,
    # nor a user's value quoted back, as in got 'treated=abc')
    r"(?<![\w\-'])([a-z][a-z0-9]*(?:_[a-z0-9]+)*)=(?![=\d])"
    r"|(?<![\w.])[a-z_]+\(\)"  # a function call, as in save_outcomes()
)


def command_parameter_names() -> set[str]:
    """Python names of every command's parameters that differ from their option text."""
    import typer.main

    group = typer.main.get_command(app)
    names = set()
    for name in group.list_commands(None):
        for param in group.get_command(None, name).params:
            if "_" in param.name:
                names.add(param.name)
    return names


LIBRARY_NAMES = {"tolerance_m", "max_dropped_share", "dropped_path", "keep_types", "n_draws"}


def bad_input_cases(files, tmp):
    """Commands run with bad inputs: those of tests/test_cli_errors.py and library refusals."""
    from test_cli_errors import DROPPED, dropped_case, option_cases

    names = {"SPEC": files["spec"], "TRIAL": files["trial"], "INC": files["incidents"]}
    names["NEW"] = tmp / "new.gpkg"
    cases = [[names.get(a, a) for a in args] for args, _ in option_cases()]
    frame = pd.read_csv(files["incidents"], dtype=str)
    for name in DROPPED:
        path, options, _ = dropped_case(name, frame, tmp)
        cases.append(["count", files["trial"], "--incidents", path, *options])
    dmy = frame.assign(date=pd.to_datetime(frame["date"]).dt.strftime("%d/%m/%Y"))
    dmy.to_csv(tmp / "dmy.csv", index=False)
    pd.DataFrame({"unit_id": ["S00001"], "pre": [1], "post": [2]}).to_csv(
        tmp / "one.csv", index=False
    )
    count = ["count", files["trial"], "--incidents", files["incidents"]]
    cases += [
        ["count", files["trial"], "--incidents", tmp / "dmy.csv", "--lon", "lon", "--lat", "lat",
         *PERIODS],
        [*count, "--x", "lon", "--y", "lat", *PERIODS],
        [*count, *PERIODS],
        [*count, "--lon", "lon", "--lat", "lat", "--pre", POST, "--post", PRE],
        [*count, "--lon", "lon", "--lat", "lat", "--pre", "2025-01-01:2025-13-45", "--post", POST],
        ["load-counts", files["trial"], "--table", tmp / "one.csv", *PERIODS],
        ["load-counts", files["trial"], "--table", tmp / "one.csv", "--pre-column", "x", *PERIODS],
        ["analyse", files["bare_trial"], "--report", tmp / "r.html"],
        ["power", files["spec"]],
        ["map", files["spec"], "--out", tmp / "m.html"],
        ["briefing", files["spec"], "--out", tmp / "b.pdf"],
        ["check", files["spec"], "--balance", "no_such_column", "--design-draws", "20"],
    ]  # fmt: skip
    return cases


@pytest.fixture(scope="module")
def error_files(demo_outputs, tmp_path_factory):
    from geoexp.design import Design, DesignSpec
    from geoexp.trialfile import write_trial

    root = tmp_path_factory.mktemp("word_errors")
    trial = root / "trial.gpkg"
    shutil.copy(demo_outputs["trial"], trial)
    incidents = pd.read_csv(demo_outputs["incidents"], dtype=str).iloc[::40]
    incidents.to_csv(root / "incidents.csv", index=False)
    # a trial without outcomes: analysing it must say which command counts them
    spec = Path(demo_outputs["spec"])
    bare = root / "bare.gpkg"
    design = Design.from_spec(DesignSpec.from_toml(spec).replace(draws=100))
    write_trial(bare, design, design.draw(), design.probabilities())
    return {
        "spec": spec,
        "trial": trial,
        "incidents": root / "incidents.csv",
        "bare_trial": bare,
        "root": root,
    }


def test_every_error_message_names_options_not_python_keywords(error_files, tmp_path):
    forbidden = command_parameter_names() | LIBRARY_NAMES
    checked = 0
    for args in bad_input_cases(error_files, tmp_path):
        result = invoke(*args)
        assert result.exit_code == 2, (args, result.output, result.exception)
        text = words(result)
        assert "Traceback" not in text
        bad = [m.group(0) for m in PYTHON_WORDS.finditer(text)]
        assert not bad, (args, bad, text)
        named = [n for n in forbidden if re.search(rf"(?<![\w-]){re.escape(n)}\b", text)]
        assert not named, (args, named, text)
        checked += 1
    assert checked > 40


@pytest.mark.parametrize(
    "args,option",
    [
        (["count", "TRIAL", "--incidents", "DMY", "--lon", "lon", "--lat", "lat", *PERIODS],
         "--date-format"),
        (["count", "TRIAL", "--incidents", "INC", "--x", "lon", "--y", "lat", *PERIODS], "--crs"),
        (["count", "TRIAL", "--incidents", "INC", "--lon", "lon", "--lat", "lat", "--pre", POST,
          "--post", PRE], "--pre"),
        (["load-counts", "TRIAL", "--table", "ONE", *PERIODS], "--fill-missing"),
        (["analyse", "BARE", "--report", "REPORT"], "geoexp count"),
        (["map", "SPEC", "--out", "MAP"], "--draw-only"),
    ],
)  # fmt: skip
def test_library_refusals_say_which_option_fixes_them(args, option, error_files, tmp_path):
    bad_input_cases(error_files, tmp_path)  # writes the files named below
    names = {
        "TRIAL": error_files["trial"],
        "INC": error_files["incidents"],
        "DMY": tmp_path / "dmy.csv",
        "ONE": tmp_path / "one.csv",
        "BARE": error_files["bare_trial"],
        "REPORT": tmp_path / "r.html",
        "SPEC": error_files["spec"],
        "MAP": tmp_path / "m.html",
    }
    result = invoke(*[names.get(a, a) for a in args])
    assert result.exit_code == 2
    assert option in words(result), words(result)


# ------------------------------------------------------------ printed words

PLURAL_AFTER_ONE = re.compile(
    r"(?<![\d.,\-+])1 (unit|district|draw|incident|trial|segment|zone|type|band|place|"
    r"treated unit|eligible unit|simulated trial|Monte Carlo draw)s\b"
)
# a number of four or more digits without separators, not part of a word, a date, a path or a code
BARE_NUMBER = re.compile(r"(?<![\w.,:\-+/#'])(\d{4,})(?![\w,\-:/'])(?!\.\d)")
SNAKE = re.compile(r"(?<![\w.'/\-])([a-z][a-z0-9]*(?:_[a-z0-9%.]+)+)(?![\w'/(\-])")


def printed_problems(text: str, allowed: set[str]) -> list[str]:
    problems = [f"plural after 1: {m.group(0)!r}" for m in PLURAL_AFTER_ONE.finditer(text)]
    for m in BARE_NUMBER.finditer(text):
        value, before = m.group(1), text[max(0, m.start() - 12) : m.start()]
        if len(value) == 4 and 1900 <= int(value) <= 2100:
            continue  # a year
        if re.search(r"seed\W*$", before):
            continue  # a seed is an identifier, not a count
        problems.append(f"no thousands separator: {text[max(0, m.start() - 30) : m.end() + 10]!r}")
    for m in SNAKE.finditer(text):
        word = m.group(1)
        if word in allowed or re.search(r"\.(html|md|csv|gpkg|toml|geojson|pdf|png)$", word):
            continue
        problems.append(f"snake_case: {word!r} in {text[max(0, m.start() - 30) : m.end() + 10]!r}")
    return problems


@pytest.fixture(scope="module")
def printed(demo_outputs, tmp_path_factory):
    """What demo, check, power and analyse print on the sample city."""
    root = tmp_path_factory.mktemp("printed")
    spec = demo_outputs["spec"]
    trial = root / "trial.gpkg"
    shutil.copy(demo_outputs["trial"], trial)
    runs = {
        "demo": ["demo", "--out", root / "demo", "--design-draws", "100"],
        "check": ["check", spec, "--design-draws", "100"],
        "power": ["power", spec, "--baseline-column", "incidents_y1", "--simulated-trials", "20",
                  "--test-draws", "50", "--alternative-spec", spec],
        "analyse": ["analyse", trial, "--report", root / "r.html", "--test-draws", "50"],
        "count": ["count", trial, "--incidents", demo_outputs["incidents"], "--lon", "lon",
                  "--lat", "lat", *PERIODS, "--type-column", "incident_type"],
    }  # fmt: skip
    out = {}
    for name, args in runs.items():
        result = invoke(*args)
        assert result.exit_code == 0, (name, result.output)
        out[name] = result.output
    out["report"] = (root / "r.md").read_text(encoding="utf-8")
    return out


# The user's own names may hold underscores: columns of the sample city's layers.
SAMPLE_COLUMNS = {"incidents_y1", "incidents_y2", "segment_id", "length_m", "incident_type"}


@pytest.mark.parametrize("name", ["demo", "check", "power", "analyse", "count", "report"])
def test_printed_output_has_words_separators_and_plurals(name, printed):
    problems = printed_problems(printed[name], SAMPLE_COLUMNS)
    assert not problems, problems


def test_the_scanner_finds_what_it_looks_for():
    # the checks above cannot pass vacuously: each pattern fires on a planted mistake
    text = "1 districts; 3542 units; expected_units 4; seed 20261202; 2026; S01115; incidents_y1"
    problems = printed_problems(text, {"incidents_y1"})
    assert any("plural" in p for p in problems)
    assert any("3542" in p for p in problems)
    assert any("expected_units" in p for p in problems)
    assert len(problems) == 3
    assert PYTHON_WORDS.search("pass date_format='dmy'") and PYTHON_WORDS.search("save_outcomes()")
    assert not PYTHON_WORDS.search("pass --date-format dmy; a == b")
