"""Exceptions raised by geoexp.

Every error a user can cause by their input is a subclass of
:class:`GeoexpError`, and every input error is also a :class:`ValueError`, so
callers can catch either. Messages name the file, the column and (up to ten)
offending rows, so that the user can fix the input without reading a traceback.
"""

from __future__ import annotations

from collections.abc import Iterable

__all__ = [
    "GeoexpError",
    "InputError",
    "CRSError",
    "GeometryError",
    "DesignError",
    "RuleError",
    "InfeasibleDesignError",
    "LockedTrialError",
    "TrialBusyError",
    "TrialWriteError",
    "TrialIntegrityError",
    "MissingPackageError",
    "describe_rows",
]


class GeoexpError(Exception):
    """Base class of every error geoexp raises on purpose."""


class InputError(GeoexpError, ValueError):
    """The user's input (a file, a column, a value) is not what was expected."""


class CRSError(InputError):
    """A layer has no CRS, an unsuitable CRS, or CRSs that disagree."""


class GeometryError(InputError):
    """Geometries are missing, empty, of mixed kinds or cannot be repaired."""


class DesignError(InputError):
    """A design spec is malformed."""


class RuleError(InputError):
    """An eligibility rule cannot be read or evaluated; the message points at the token."""


class InfeasibleDesignError(DesignError):
    """A design spec is well formed but cannot be satisfied by these units."""


class LockedTrialError(GeoexpError):
    """A trial's assignment is locked and would be overwritten."""


class TrialBusyError(GeoexpError):
    """Another geoexp command kept writing a trial file for longer than the wait allowed."""


class TrialWriteError(GeoexpError, OSError):
    """Writing a trial file failed (e.g. no space left); the file was left as it was."""


class TrialIntegrityError(InputError):
    """A trial file's contents no longer match the fingerprints recorded when they were written."""


class MissingPackageError(GeoexpError, ImportError):
    """An optional Python package that a requested feature needs is not installed."""


def describe_rows(rows: Iterable[object], limit: int = 10) -> str:
    """Return ``"a, b, c (and 7 more)"`` for at most ``limit`` offending rows.

    Parameters
    ----------
    rows : iterable
        The offending rows (ids or row numbers); text is shown quoted.
    limit : int, default 10
        How many rows to name before counting the rest.

    Returns
    -------
    str
        The first ``limit`` rows joined by commas, followed by
        ``" (and N more)"`` (N with thousands separators) when there are more.
    """
    rows = list(rows)
    shown = ", ".join(repr(r) if isinstance(r, str) else str(r) for r in rows[:limit])
    rest = len(rows) - limit
    return shown + (f" (and {rest:,} more)" if rest > 0 else "")
