"""The files a command reads: checked to be readable, and listed for the output guard."""

from __future__ import annotations

from pathlib import Path
from typing import overload

from geoexp.errors import InputError


def readable_text(path: Path, what: str) -> str:
    """Return the UTF-8 text of ``path`` or raise an error saying why it cannot be read."""
    if not path.exists():
        raise InputError(f"{what} '{path}' does not exist")
    if path.is_dir():
        raise InputError(f"{what} '{path}' is a folder, not a file")
    try:
        data = path.read_bytes()
    except OSError as err:
        raise InputError(f"could not read {what} '{path}': {err.strerror or err}") from err
    if b"\x00" in data[:8192]:
        raise InputError(f"{what} '{path}' is a binary file, not text")
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        line = data[: err.start].count(b"\n") + 1
        raise InputError(
            f"{what} '{path}' is not UTF-8 text (an undecodable byte on line {line}); save it "
            "as UTF-8"
        ) from None


def load_spec(path: Path):
    """Read a design spec, refusing a missing, binary or non-UTF-8 file with a clear message."""
    from geoexp.design import DesignSpec

    readable_text(path, "the design spec")
    return DesignSpec.from_toml(path)


def spec_inputs(path: Path, spec) -> dict[str, Path]:
    """The design spec and the files it names (units layer, exclusion zones), for the guard."""
    from geoexp.postgis import is_database_url

    found = {"the design spec": path}
    if not is_database_url(spec.units.path):  # a database table is no file to guard
        found["the spec's units layer"] = spec.resolve(spec.units.path)
    for i, zone in enumerate(spec.eligible.exclude, start=1):
        found[f"the spec's exclusion zone {i}"] = spec.resolve(zone)
    return found


@overload
def incidents_input(text: str) -> Path | str: ...
@overload
def incidents_input(text: None) -> None: ...
def incidents_input(text: str | None) -> Path | str | None:
    """An ``--incidents`` value: a database URL stays text, anything else is a file path."""
    from geoexp.postgis import is_database_url

    if text is None or is_database_url(text):
        return text
    return Path(text)


def read_counts_csv(path: Path, id_column: str):
    """Read a CSV of counts per unit (ids as text), refusing unreadable or empty files."""
    import io

    import pandas as pd

    text = readable_text(path, "the counts file")
    if not text.strip():
        raise InputError(
            f"the counts file '{path}' is empty; it needs a header and one row per unit"
        )
    try:
        frame = pd.read_csv(io.StringIO(text), dtype={id_column: str})
    except (pd.errors.ParserError, pd.errors.EmptyDataError, ValueError) as err:
        raise InputError(f"could not read the counts file '{path}' as CSV: {err}") from None
    if frame.empty:
        raise InputError(f"the counts file '{path}' has a header but no rows")
    return frame
