"""One writer at a time per trial file: an advisory lock file beside the trial.

Every read-modify-write of a trial holds the lock ``<trial>.lock`` (through
the ``filelock`` library, which uses the operating system's file locks, so a
killed writer's lock is released with its process). Under the lock the trial
is read afresh, changed in a temporary copy and renamed over the file.
Temporary copies left behind by writers that were killed are removed then,
because no other writer can be using them.
"""

from __future__ import annotations

import contextlib
import logging
import os
from collections.abc import Callable, Iterator
from pathlib import Path

import filelock

from geoexp._atomic import temporary_paths
from geoexp.errors import TrialBusyError, TrialWriteError

__all__ = ["DEFAULT_WAIT_S", "Notify", "lock_path", "trial_lock"]

DEFAULT_WAIT_S = 120.0
Notify = Callable[[str], None]

log = logging.getLogger("geoexp.trialfile")


def lock_path(trial: str | os.PathLike[str]) -> Path:
    """The lock file of a trial: ``<trial>.lock`` beside it.

    Parameters
    ----------
    trial : str or os.PathLike
        The trial GeoPackage (it need not exist).

    Returns
    -------
    pathlib.Path
        The lock file: the trial's file name with ``.lock`` appended, in the
        same folder.
    """
    trial = Path(trial)
    return trial.with_name(trial.name + ".lock")


def _say(notify: Notify | None, message: str) -> None:
    # Without a callback the note goes to the "geoexp.trialfile" logger; with no
    # logging set up, Python prints warnings on standard error.
    if notify is not None:
        notify(message)
    else:
        log.warning(message)


@contextlib.contextmanager
def trial_lock(
    trial: str | os.PathLike[str],
    *,
    wait_s: float | None = None,
    notify: Notify | None = None,
) -> Iterator[list[Path]]:
    """Hold the trial's write lock; yields the stale temporary files removed on entry.

    Parameters
    ----------
    trial : path
        The trial GeoPackage (it need not exist yet).
    wait_s : float, optional
        Seconds to wait for another writer (default :data:`DEFAULT_WAIT_S`).
    notify : callable, optional
        Receives plain-words notes: that this call waits for another writer,
        and how many stale temporary files were removed. Default: the
        ``geoexp.trialfile`` logger at warning level.

    Raises
    ------
    geoexp.errors.TrialBusyError
        Another writer held the lock for longer than ``wait_s`` seconds.
    """
    trial = Path(trial)
    wait_s = DEFAULT_WAIT_S if wait_s is None else float(wait_s)
    lock = filelock.FileLock(lock_path(trial), thread_local=False)
    try:
        trial.parent.mkdir(parents=True, exist_ok=True)
        _acquire(lock, trial, wait_s, notify)
    except OSError as err:  # a folder that cannot be written, say
        raise TrialWriteError(
            f"cannot take the write lock of trial file {str(trial)!r} "
            f"({str(lock_path(trial))!r}): {err}"
        ) from err
    try:
        removed = _remove_stale(trial)
        if removed:
            _say(
                notify,
                f"removed {len(removed)} temporary file{'s' if len(removed) != 1 else ''} left "
                f"by an interrupted write of {trial.name}",
            )
        yield removed
    finally:
        lock.release()


def _acquire(
    lock: filelock.BaseFileLock, trial: Path, wait_s: float, notify: Notify | None
) -> None:
    try:
        lock.acquire(blocking=False)
        return
    except filelock.Timeout:
        pass
    _say(
        notify,
        f"waiting for another geoexp command to finish writing {trial.name} (up to {wait_s:g} s)",
    )
    try:
        lock.acquire(timeout=wait_s, poll_interval=0.05)
    except filelock.Timeout:
        raise TrialBusyError(
            f"another geoexp command is still writing trial file {str(trial)!r} after "
            f"{wait_s:g} s of waiting; try again when it has finished (its lock file is "
            f"{str(lock_path(trial))!r}; the lock is released when that command ends, "
            "even if it is killed)"
        ) from None


def _remove_stale(trial: Path) -> list[Path]:
    removed = []
    for path in temporary_paths(trial):
        with contextlib.suppress(FileNotFoundError):
            path.unlink()
            removed.append(path)
    return removed
