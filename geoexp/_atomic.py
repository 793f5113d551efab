"""Atomic file writes: write to a temporary file beside the target, then rename."""

from __future__ import annotations

import contextlib
import os
import re
import tempfile
from collections.abc import Iterator
from pathlib import Path

# tempfile.mkstemp puts 8 characters from this alphabet between prefix and suffix
_RANDOM_PART = "[a-z0-9_]{8}"
# SQLite (GeoPackage) keeps side files beside a database it writes
_SIDE_FILES = ("-journal", "-wal", "-shm")


def _prefix(target: Path) -> str:
    return f".{target.stem}."


@contextlib.contextmanager
def atomic_path(target: str | os.PathLike[str]) -> Iterator[Path]:
    """Yield a temporary path in the target's folder; rename it onto ``target`` on success.

    The temporary file keeps the target's suffix, so writers that choose a format
    by extension (GeoPackage, GeoJSON, npz) behave the same. On error the
    temporary file is removed and the target is untouched. The finished file
    is flushed to disk before the rename, so that the rename never exposes a
    file whose contents are still only in memory.
    """
    target = Path(target)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=_prefix(target), suffix=target.suffix, dir=target.parent)
    os.close(fd)
    os.unlink(tmp)  # writers such as GDAL want to create the file themselves
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        _flush(tmp_path)
        os.replace(tmp_path, target)
        _flush_folder(target.parent)
    finally:
        for path in (tmp_path, *(Path(f"{tmp_path}{side}") for side in _SIDE_FILES)):
            if path.exists():
                path.unlink()


def _flush(path: Path) -> None:
    if path.is_file():
        with open(path, "rb+") as handle:
            os.fsync(handle.fileno())


def _flush_folder(folder: Path) -> None:
    # a folder cannot be opened for syncing on every platform; the rename is done either way
    with contextlib.suppress(OSError):
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def temporary_paths(target: str | os.PathLike[str]) -> list[Path]:
    """Temporary files that :func:`atomic_path` made for ``target`` and that are still there.

    Only names of exactly the form :func:`atomic_path` gives (and SQLite's side
    files beside them) match, so the temporary files of other targets in the same
    folder, even ones whose names start alike, are never listed. A writer killed
    half way leaves such a file behind; the caller decides when none can be in use.
    """
    target = Path(target)
    pattern = re.compile(
        re.escape(_prefix(target))
        + _RANDOM_PART
        + re.escape(target.suffix)
        + "(?:"
        + "|".join(re.escape(s) for s in _SIDE_FILES)
        + ")?"
    )
    folder = target.parent
    if not folder.is_dir():
        return []
    return sorted(
        folder / name for name in os.listdir(folder) if pattern.fullmatch(name) is not None
    )
