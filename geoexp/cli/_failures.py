"""How the command line fails: a message and exit status 2 for mistakes, never a traceback.

* geoexp's own errors (:class:`~geoexp.errors.GeoexpError`) and operating-system
  errors on a named file (no such file, no permission, a full disk) are the
  user's to fix: one message, exit status 2.
* Usage errors (a bad option value, a missing argument) keep click's
  message and exit status 2.
* Anything else is a defect of geoexp: one line saying so and where the full
  traceback was written, exit status 1. The log folder is the user's cache
  folder (``platformdirs.user_cache_dir("geoexp")/logs`` when platformdirs is
  installed, else ``~/.cache/geoexp/logs``), or the system's temporary folder
  if neither can be written.
"""

from __future__ import annotations

import datetime as dt
import os
import sys
import tempfile
import traceback
from pathlib import Path
from typing import TYPE_CHECKING

import typer
from typer.core import TyperGroup

from geoexp.cli._wording import command_keywords, in_option_words
from geoexp.errors import GeoexpError

if TYPE_CHECKING:
    # The type checker reads the class where the installed typer keeps it (its own copy of
    # click); at run time it is found from typer's BadParameter, which works with every typer.
    from typer._click.exceptions import ClickException
else:
    # The click exception base as typer uses it (recent typer releases carry their own copy
    # of click, so the class is found from typer's own BadParameter rather than imported).
    ClickException = next(c for c in typer.BadParameter.__mro__ if c.__name__ == "ClickException")

USER_ERROR = 2
UNEXPECTED = 1


class UserError(ClickException):
    """A mistake in the user's input: printed as ``error: <message>``, exit status 2."""

    exit_code = USER_ERROR

    def show(self, file=None) -> None:  # noqa: D102  (click's interface)
        # Plain text: the message holds user text (names, paths) that must print as written.
        typer.echo(f"error: {self.format_message()}", file=file or sys.stderr)


class UnexpectedError(ClickException):
    """A defect of geoexp: one line naming the log file, exit status 1."""

    exit_code = UNEXPECTED

    def show(self, file=None) -> None:  # noqa: D102  (click's interface)
        typer.echo(self.format_message(), file=file or sys.stderr)


def log_folders() -> list[Path]:
    """Folders tried, in order, for the log of an unexpected failure."""
    folders = []
    try:
        import platformdirs

        folders.append(Path(platformdirs.user_cache_dir("geoexp")) / "logs")
    except ImportError:
        pass
    folders.append(Path.home() / ".cache" / "geoexp" / "logs")
    folders.append(Path(tempfile.gettempdir()) / "geoexp-logs")
    return folders


def write_crash_log(err: BaseException) -> Path | None:
    """Write the traceback of ``err`` to a new log file; return its path (None if none could be)."""
    stamp = dt.datetime.now(dt.UTC).strftime("%Y%m%dT%H%M%SZ")
    text = f"geoexp failed unexpectedly at {stamp}\ncommand: {' '.join(sys.argv)}\n\n" + "".join(
        traceback.format_exception(type(err), err, err.__traceback__)
    )
    for folder in log_folders():
        try:
            folder.mkdir(parents=True, exist_ok=True)
            path = folder / f"failure-{stamp}-{os.getpid()}.log"
            path.write_text(text, encoding="utf-8")
            return path
        except OSError:
            continue
    return None


def unexpected(err: BaseException) -> UnexpectedError:
    """The one-line report of an unexpected failure, with its traceback logged."""
    path = write_crash_log(err)
    where = f"the full traceback is in {path}" if path else "no log file could be written"
    message = " ".join(str(err).split())
    return UnexpectedError(
        f"geoexp failed unexpectedly: {type(err).__name__}: {message}; {where}. "
        "This is a defect of geoexp, not of your input: please report it with the log."
    )


def as_click_error(err: BaseException, keywords: dict[str, str] | None = None) -> ClickException:
    """Translate any exception raised by a command into the click exception to show.

    ``keywords`` maps the Python keywords of the command that ran to its options,
    so that a library message reads in the command line's words.
    """
    if isinstance(err, GeoexpError):
        return UserError(in_option_words(str(err), keywords or {}))
    if isinstance(err, OSError) and err.filename is not None:
        reason = err.strerror or str(err)
        return UserError(f"could not use the file '{err.filename}': {reason}")
    if isinstance(err, OSError) and err.errno is not None:
        return UserError(f"the operating system refused: {err.strerror or err}")
    return unexpected(err)


class GeoexpGroup(TyperGroup):
    """The command group: commands listed in workflow order, failures through :func:`as_click_error`.

    ``workflow`` holds (heading, command names) pairs in the order of the job; a
    command not listed there is shown last, under "Other commands".
    """

    workflow: tuple[tuple[str, tuple[str, ...]], ...] = ()

    def list_commands(self, ctx):  # noqa: D102  (click's interface)
        registered = list(self.commands)
        ordered = [name for _, names in self.workflow for name in names if name in self.commands]
        return ordered + [name for name in registered if name not in ordered]

    def format_commands(self, ctx, formatter) -> None:
        """List the commands under the step of the job they belong to, one line each."""
        listed = set()
        sections = []
        for title, names in (*self.workflow, ("Other commands", tuple(self.list_commands(ctx)))):
            rows = []
            for name in names:
                command = self.get_command(ctx, name)
                if command is None or command.hidden or name in listed:
                    continue
                listed.add(name)
                # the whole first sentence: a description cut short helps no one
                rows.append((name, command.get_short_help_str(limit=10_000)))
            if rows:
                sections.append((title, rows))
        for title, rows in sections:
            with formatter.section(title):
                formatter.write_dl(rows)

    def invoke(self, ctx):  # noqa: D102  (click's interface)
        try:
            return super().invoke(ctx)
        except (ClickException, typer.Exit, typer.Abort):
            raise
        except Exception as err:  # noqa: BLE001  (the last resort: nothing may escape as a traceback)
            name = ctx.invoked_subcommand
            command = self.get_command(ctx, name) if name else None
            keywords = command_keywords(command.params) if command is not None else {}
            raise as_click_error(err, keywords) from err
