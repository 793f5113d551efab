"""Progress bars: the library reports every draw once; the command line shows bars only on a terminal."""

from __future__ import annotations

import io

import pytest
from rich.console import Console
from typer.testing import CliRunner

import geoexp.cli._progress_bars as bars
from geoexp._progress import listening, tracked
from geoexp.cli import app


def recorder():
    """A listener that keeps, per loop, its announced total and the steps reported."""
    loops = []

    def listener(what, total):
        loops.append([what, total, 0])

        def advance(steps):
            loops[-1][2] += steps

        return advance

    return loops, listener


def test_no_listener_means_no_calls():
    advance = tracked("anything", 10)
    assert advance(3) is None  # nothing installed: a no-op


def test_every_draw_of_the_design_is_reported_once(demo_outputs):
    from geoexp.design import Design, DesignSpec

    spec = DesignSpec.from_toml(demo_outputs["spec"]).replace(draws=300)
    design = Design.from_spec(spec)
    loops, listener = recorder()
    with listening(listener):
        design.probabilities()
    assert loops, "no loop reported its progress"
    for what, total, done in loops:
        assert total == 300 and done == total, (what, total, done)
    # outside the block nobody listens any more
    before = len(loops)
    design.probabilities()
    assert len(loops) == before


@pytest.fixture
def terminal(monkeypatch):
    """Make the bars' console a terminal writing into a buffer."""
    buffer = io.StringIO()

    def console(**kwargs):
        kwargs.pop("stderr", None)
        return Console(file=buffer, force_terminal=True, width=100, **kwargs)

    monkeypatch.setattr(bars, "Console", console)
    return buffer


def test_bar_on_a_terminal_and_none_with_quiet(terminal, demo_outputs):
    args = ["check", str(demo_outputs["spec"]), "--design-draws", "1000"]
    shown = CliRunner().invoke(app, args)
    assert shown.exit_code == 0, shown.output
    assert "Draws of the design" in terminal.getvalue()
    assert "━" not in shown.stdout  # the table output stays clean

    terminal.seek(0)
    terminal.truncate()
    quiet = CliRunner().invoke(app, [*args, "--quiet"])
    assert quiet.exit_code == 0, quiet.output
    assert terminal.getvalue() == ""


def test_no_bar_when_output_is_not_a_terminal(demo_outputs):
    result = CliRunner().invoke(app, ["check", str(demo_outputs["spec"]), "--design-draws", "1000"])
    assert result.exit_code == 0, result.output
    assert "━" not in result.output and "Draws of the design" not in result.output


def test_short_loops_get_no_bar(terminal):
    with bars.progress_shown(False):
        advance = tracked("draws of the design", bars.MIN_STEPS - 1)
        advance(bars.MIN_STEPS - 1)
    assert "Draws of the design" not in terminal.getvalue()
