"""The results report: one context, two formats with the same content; user text stays text."""

from __future__ import annotations

import dataclasses
import re
import shutil
import subprocess

import numpy as np
import pytest

from geoexp.briefing import briefing_pack
from geoexp.report import RESULT_MAP_TITLE, render_report, report_context, write_report
from geoexp.trialfile import TrialFile

# Characters that matplotlib reads as math ("$", "_", "^") and a bracketed tag. Each string
# fails to parse as math text, so it only renders if it is drawn as plain text.
ODD_NAME = "Pilot $x^$ run_2 ^north [/pilot]"
ODD_DESCRIPTION = "Main St $5_$ ^ [/pilot]"


@pytest.fixture(scope="module")
def analysis(trial):
    from geoexp.analysis import analyse

    return analyse(trial, n_draws=100, intervals=False)


def _headings(text: str, pattern: str) -> list[str]:
    return [h.strip() for h in re.findall(pattern, text, flags=re.M)]


def test_html_and_markdown_have_the_same_sections_and_findings(analysis, trial, tmp_path):
    import html as html_lib

    context = report_context(analysis, report_path=tmp_path / "r.html", trial=trial)
    page = render_report(context, "html")
    names = [f"r_figure{i + 1}.png" for i in range(len(context.figures))]
    markdown = render_report(context, "md", figure_files=names)
    sections_html = [html_lib.unescape(h) for h in _headings(page, r"<h2>([^<]+)</h2>")]
    sections_md = _headings(markdown, r"^## (.+)$")
    assert sections_html == sections_md
    assert RESULT_MAP_TITLE in sections_md
    shown = html_lib.unescape(page)
    for sentence in context.findings:
        assert sentence in shown
        assert f"- {sentence}" in markdown
    # Every number of the estimates table appears in both, formatted the same way.
    for value in context.estimates["estimate"]:
        text = f"{value:.3f}"
        assert text in page and text in markdown
    for paragraph in (context.reading, context.methods, context.displacement_text):
        assert paragraph in shown
        assert paragraph in markdown


@pytest.fixture(scope="module")
def odd_trial(demo, tmp_path_factory):
    """The demo trial with math characters in its name and in street descriptions."""
    path = tmp_path_factory.mktemp("odd") / "trial.gpkg"
    shutil.copy2(demo / "trial.gpkg", path)
    tf = TrialFile.open(path)
    units = tf.units()
    treated = tf.assignment()["treated"].astype(bool).reindex(units.index).to_numpy()
    units = units.assign(description=np.where(treated, ODD_DESCRIPTION, units["description"]))
    return tf.write_layers({"units": units}, meta={"name": ODD_NAME})


def test_user_text_with_math_characters_is_drawn_as_text(odd_trial, analysis, tmp_path):
    pack = briefing_pack(odd_trial, tmp_path / "pack.pdf")
    pdftotext = shutil.which("pdftotext")
    assert pdftotext, "pdftotext (Debian's poppler-utils) is needed to read the pack"
    text = subprocess.run(
        [pdftotext, str(pack), "-"], capture_output=True, text=True, check=True
    ).stdout
    # Drawn as typed: math text would have failed, or dropped the "$" signs.
    assert ODD_NAME in text
    assert ODD_DESCRIPTION in text
    odd = dataclasses.replace(analysis, name=ODD_NAME)
    page, markdown = write_report(odd, tmp_path / "report.html", trial=odd_trial)
    assert ODD_NAME in page.read_text(encoding="utf-8")
    assert f"# {ODD_NAME}: results" in markdown.read_text(encoding="utf-8")


def test_plan_flow_is_the_flow_of_the_rebuilt_design(analysis, trial):
    # The report counts its flow from the stored units without rebuilding the exposure graph;
    # it must be the flow of the design rebuilt in full (design_from_trial, the analysis' own).
    from geoexp.design import unit_flow
    from geoexp.report._plan import plan_facts
    from geoexp.trialfile import design_from_trial

    design, drawn = design_from_trial(trial)
    analysed = int(analysis.per_unit["post"].notna().sum())
    _, flow = plan_facts(analysis, trial)
    assert flow == unit_flow(design, drawn, n_analysed=analysed)
    assert flow.n_treated == int(drawn.treated.sum()) > 0


def test_read_columns_is_read_without_geometry(trial):
    whole = trial.assignment()
    some = trial.read_columns("assignment", ["treated", "eligible"])
    assert list(some.columns) == ["treated", "eligible"]
    assert some.index.equals(whole.index)
    assert (some["treated"] == whole["treated"]).all()
    with pytest.raises(ValueError, match="no column"):
        trial.read_columns("assignment", ["no_such_column"])
