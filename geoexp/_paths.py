"""Guard output paths: never write over the trial file, an input, or into nonsense.

A command names its inputs (the design spec and the files the spec points to,
the trial file, incidents, a counts table) and its outputs (including derived
ones, such as a report's Markdown twin). :func:`check_outputs` refuses, before
anything is written, any output that

* is the trial file or an input: the same path after resolving symlinks, or
  the same file reached another way (a hard link or a second symlink), which
  is seen by comparing ``os.stat`` device and inode numbers;
* names an existing folder;
* lies under a path that is a regular file (``report.html/out.html``) or
  under a link that leads nowhere;
* is named twice (two outputs on the same file).

:func:`writing` turns an operating-system error raised while writing (a full
disk, no permission) into an :class:`~geoexp.errors.InputError` naming the file
and the reason.
"""

from __future__ import annotations

import contextlib
import errno
import os
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path

from geoexp.errors import InputError

PathLike = str | os.PathLike


@dataclass(frozen=True)
class _Named:
    label: str  # how the user named it: an option ("--report") or a role ("the trial file")
    path: Path


def _identity(path: Path) -> tuple[int, int] | None:
    try:
        st = os.stat(path)
    except OSError:
        return None
    return st.st_dev, st.st_ino


def _resolved(path: Path) -> Path:
    try:
        return path.expanduser().resolve(strict=False)
    except (OSError, RuntimeError):  # a symlink loop, an unreadable folder
        return path.absolute()


def _same_file(a: Path, b: Path) -> bool:
    if _resolved(a) == _resolved(b):
        return True
    ia, ib = _identity(a), _identity(b)
    return ia is not None and ia == ib


def _first_file_parent(path: Path) -> Path | None:
    for parent in _resolved(path).parents:
        if parent.is_file():
            return parent
    return None


def check_outputs(
    outputs: Mapping[str, PathLike | None],
    inputs: Mapping[str, PathLike | None],
    *,
    trial: PathLike | None = None,
) -> None:
    """Refuse outputs that would overwrite the trial file or an input, or cannot be files.

    Parameters
    ----------
    outputs : mapping of label to path
        Files about to be written, labelled as the user named them (an option
        such as ``"--report"``, or ``"--report (its Markdown twin)"`` for a
        derived file). ``None`` entries are skipped.
    inputs : mapping of label to path
        Files read (``"the design spec"``, ``"--incidents"``); ``None`` skipped.
    trial : path, optional
        The trial file: never an output of a command that reads it.

    Raises
    ------
    geoexp.errors.InputError
        Naming the option and the file: an output that is the trial file or an
        input (also through symlinks and hard links), an existing folder, a
        path under a regular file, or the same file as another output.
    """
    outs = [_Named(k, Path(v)) for k, v in outputs.items() if v is not None]
    ins = [_Named(k, Path(v)) for k, v in inputs.items() if v is not None]
    if trial is not None:
        ins.insert(0, _Named("the trial file", Path(trial)))
    seen: list[_Named] = []
    for out in outs:
        for other in ins:
            if _same_file(out.path, other.path):
                raise InputError(
                    f"{out.label} '{out.path}' is {other.label} '{other.path}'; geoexp does not "
                    f"write over {other.label}: choose another file for {out.label}"
                )
        if out.path.is_dir():
            raise InputError(
                f"{out.label} '{out.path}' is a folder; give a file name, e.g. "
                f"'{out.path / ('out' + (out.path.suffix or '.txt'))}'"
            )
        broken = next(
            (p for p in (out.path, *out.path.parents) if p.is_symlink() and not p.exists()),
            None,
        )
        if broken is not None and broken != out.path:
            raise InputError(
                f"{out.label} '{out.path}' cannot be written: '{broken}' is a link that leads "
                "nowhere (a missing target or a loop)"
            )
        blocker = _first_file_parent(out.path)
        if blocker is not None:
            raise InputError(
                f"{out.label} '{out.path}' cannot be written: '{blocker}' is a file, not a folder"
            )
        for earlier in seen:
            if _same_file(out.path, earlier.path):
                raise InputError(
                    f"{out.label} and {earlier.label} name the same file '{out.path}'; "
                    "give them different files"
                )
        seen.append(out)


@contextlib.contextmanager
def writing(path: PathLike, what: str = "output") -> Iterator[None]:
    """Turn an ``OSError`` raised inside the block into an error naming ``path`` and the reason.

    A full disk, a read-only folder or a missing permission is the user's
    environment, not a defect of geoexp: the message says which file could not
    be written and what the operating system said.
    """
    try:
        yield
    except OSError as err:
        reason = err.strerror or (os.strerror(err.errno) if err.errno else str(err))
        hint = ""
        if err.errno == errno.ENOSPC:
            hint = "; free some space or write elsewhere"
        elif err.errno in (errno.EACCES, errno.EPERM, errno.EROFS):
            hint = "; choose a folder you may write to"
        raise InputError(f"could not write the {what} '{path}': {reason}{hint}") from err
