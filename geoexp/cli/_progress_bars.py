"""Progress bars for long runs: on a terminal only, never with --quiet, never into files."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager

from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

from geoexp._progress import listening

# Loops shorter than this many steps finish in well under a second: no bar for them.
MIN_STEPS = 1_000


@contextmanager
def progress_shown(quiet: bool) -> Iterator[None]:
    """Show a bar for every long loop over draws run inside the block.

    The bars go to standard error, and only when it is a terminal: output piped
    or redirected to a file never holds them, and neither do tests.
    """
    bars = Console(stderr=True, highlight=False, markup=False, emoji=False)
    if quiet or not bars.is_terminal:
        with listening(None):
            yield
        return
    progress = Progress(
        TextColumn("{task.description}"),
        BarColumn(),
        MofNCompleteColumn(),
        TimeRemainingColumn(),
        console=bars,
        transient=True,
    )

    def listener(what: str, total: int):
        if total < MIN_STEPS:
            return lambda steps: None
        task = progress.add_task(what[:1].upper() + what[1:], total=total)

        def advance(steps: int) -> None:
            progress.advance(task, steps)
            if progress.tasks[task].finished:
                progress.remove_task(task)

        return advance

    with progress, listening(listener):
        yield
