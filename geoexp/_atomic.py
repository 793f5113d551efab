"""Atomic file writes: write to a temporary file beside the target, then rename."""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path


@contextlib.contextmanager
def atomic_path(target: str | os.PathLike[str]) -> Iterator[Path]:
    """Yield a temporary path in the target's folder; rename it onto ``target`` on success.

    The temporary file keeps the target's suffix, so writers that choose a format
    by extension (GeoPackage, GeoJSON, npz) behave the same. On error the
    temporary file is removed and the target is untouched.
    """
    target = Path(target)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.stem}.", suffix=target.suffix, dir=target.parent)
    os.close(fd)
    os.unlink(tmp)  # writers such as GDAL want to create the file themselves
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        os.replace(tmp_path, target)
    finally:
        if tmp_path.exists():
            tmp_path.unlink()
