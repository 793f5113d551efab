"""The keys a design spec may hold, with the type and range of each.

:func:`checked` walks a spec's nested dict before anything uses a value and
returns a copy with whole numbers as ``int``; anything else raises
:class:`~geoexp.errors.DesignError` naming the table, the key, what was
expected and what was received. Rules of the check:

* whole numbers (``treated``, ``draws``, ``seed``, counts) must be integers; a
  float is accepted only when integral (``12.0`` reads as 12);
* true/false is never a number, and a number is never text;
* a number of metres or a share may be an integer or a float, finite, within
  its interval; it is kept as written, so the spec's hash does not change;
* lists hold elements of one stated type;
* an ``[eligible] where`` rule must parse (its columns are checked on the layer);
* ``None`` (from a dict built in Python) means the key was not given.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Callable
from typing import Any

from geoexp.design._limits import MAX_DRAWS, MIN_DRAWS
from geoexp.errors import DesignError, RuleError

__all__ = ["checked"]

_MAX_COUNT = 100_000_000  # more units than any layer geoexp can hold
_MAX_METRES = 100_000.0  # 100 km: a band or gap beyond this is surely a typo
_MAX_SEED = 2**63 - 1  # the largest TOML integer

Check = Callable[[Any, str], Any]


def _show(value: Any) -> str:
    text = repr(value)
    if len(text) > 60:
        text = text[:57] + "..."
    kind = {bool: "true/false", str: "text", int: "integer", float: "number"}.get(
        type(value), type(value).__name__
    )
    return f"{kind} {text}"


def _fail(where: str, expected: str, value: Any) -> DesignError:
    return DesignError(f"{where} must be {expected}, got {_show(value)}")


def _is_real(value: Any) -> bool:
    return (
        isinstance(value, numbers.Real)
        and not isinstance(value, bool)
        and math.isfinite(float(value))
    )


def text(value: Any, where: str) -> str:
    """Non-empty text.

    Parameters
    ----------
    value : object
        The value read from the spec.
    where : str
        The value's place in the spec (e.g. ``"[design] name"``), for the message.

    Returns
    -------
    str
        ``value`` unchanged.

    Raises
    ------
    geoexp.errors.DesignError
        ``value`` is not text or is blank.
    """
    if not isinstance(value, str) or not value.strip():
        raise _fail(where, "non-empty text", value)
    return value


def whole(low: int, high: int, what: str = "a whole number") -> Check:
    """An integer in ``[low, high]`` (an integral float is accepted).

    Parameters
    ----------
    low, high : int
        Smallest and largest value allowed (both included).
    what : str
        Words for the value in the error message.

    Returns
    -------
    Check
        A check ``(value, where) -> int`` that returns the value as an int
        and raises :class:`geoexp.errors.DesignError` otherwise.
    """

    def check(value: Any, where: str) -> int:
        expected = f"{what} from {low:,} to {high:,}"
        if not _is_real(value):
            raise _fail(where, expected, value)
        if not float(value).is_integer():
            raise _fail(where, f"{expected} (a whole number, not a fraction)", value)
        number = int(value)
        if not low <= number <= high:
            raise _fail(where, expected, value)
        return number

    return check


def real(low: float, high: float, *, low_open: bool, high_open: bool, what: str) -> Check:
    """A finite number in an interval, kept as written.

    Parameters
    ----------
    low, high : float
        Ends of the interval.
    low_open, high_open : bool
        Whether each end is left out of the interval.
    what : str
        Words for the value in the error message.

    Returns
    -------
    Check
        A check ``(value, where) -> value`` that returns the number unchanged
        and raises :class:`geoexp.errors.DesignError` otherwise.
    """
    interval = f"{'(' if low_open else '['}{low:g}, {high:g}{')' if high_open else ']'}"

    def check(value: Any, where: str) -> Any:
        expected = f"{what} in {interval}"
        if not _is_real(value):
            raise _fail(where, expected, value)
        x = float(value)
        if x < low or x > high or (low_open and x == low) or (high_open and x == high):
            raise _fail(where, expected, value)
        return value

    return check


def flag(value: Any, where: str) -> bool:
    """true or false (never a number or text)."""
    if not isinstance(value, bool):
        raise _fail(where, "true or false", value)
    return value


def choice(*options: str) -> Check:
    """One of the given words.

    Parameters
    ----------
    *options : str
        The words allowed.

    Returns
    -------
    Check
        A check ``(value, where) -> str`` that returns the word and raises
        :class:`geoexp.errors.DesignError` naming the options otherwise.
    """

    def check(value: Any, where: str) -> str:
        if not isinstance(value, str) or value not in options:
            raise _fail(where, "one of " + ", ".join(repr(o) for o in options), value)
        return value

    return check


def listing(element: Check, what: str, *, single: bool = False, non_empty: bool = False) -> Check:
    """A list whose elements pass ``element``; ``single`` also accepts one bare element.

    Parameters
    ----------
    element : Check
        The check of each element; its messages name the element as ``where[i]``.
    what : str
        Words for the elements in the error message.
    single : bool
        Accept one bare element as a list of one.
    non_empty : bool
        Refuse an empty list.

    Returns
    -------
    Check
        A check ``(value, where) -> list`` that returns the checked elements
        and raises :class:`geoexp.errors.DesignError` otherwise.
    """

    def check(value: Any, where: str) -> list:
        if single and not isinstance(value, list):
            value = [value]
        if not isinstance(value, list):
            raise _fail(where, f"a list of {what}", value)
        if non_empty and not value:
            raise _fail(where, f"a non-empty list of {what}", value)
        return [element(v, f"{where}[{i}]") for i, v in enumerate(value)]

    return check


def _quotas(value: Any, where: str) -> dict[str, int]:
    if not isinstance(value, dict):
        raise _fail(where, "a table of block = number of treated units", value)
    count = whole(0, _MAX_COUNT, "a number of treated units")
    return {text(k, f"{where} key"): count(v, f"{where}.{k}") for k, v in value.items()}


def _rule(value: Any, where: str) -> str:
    from geoexp.units import parse_rule

    try:
        parse_rule(text(value, where))
    except RuleError as err:
        raise DesignError(f"{where} is not a rule: {err}") from None
    return value


def _crs(value: Any, where: str) -> Any:
    if isinstance(value, str):
        return text(value, where)
    return whole(1, 999_999, "a CRS as text or an EPSG code")(value, where)


_metres = real(0, _MAX_METRES, low_open=True, high_open=False, what="a distance")
_share = real(0, 1, low_open=True, high_open=False, what="a share")

SCHEMA: dict[str, dict[str, Check]] = {
    "units": {
        "path": text,
        "id_column": text,
        "layer": text,
        "crs": _crs,
        "planar": choice("m", "ft", "us-ft"),
        "number_rows": flag,
        "query": text,
    },
    "eligible": {
        "where": _rule,
        "top_column": text,
        "top_k": whole(1, _MAX_COUNT, "a number of units"),
        "top_share": _share,
        "exclude": listing(text, "file paths", single=True),
        "exclude_how": choice("intersects", "within"),
    },
    "assignment": {
        "method": choice("complete", "blocked", "saturation"),
        "treated": whole(1, _MAX_COUNT, "a number of units"),
        "share": real(0, 1, low_open=True, high_open=True, what="a share"),
        "block_column": text,
        "block_share": _share,
        "block_treated": whole(1, _MAX_COUNT, "a number of units per block"),
        "block_quotas": _quotas,
        "gap_m": _metres,
        "gap_ft": real(0, _MAX_METRES / 0.3048, low_open=True, high_open=False, what="feet"),
        "min_pure_controls": whole(0, _MAX_COUNT, "a number of units"),
        "cluster_column": text,
        "saturations": listing(
            real(0, 1, low_open=False, high_open=False, what="a saturation"),
            "saturations",
            non_empty=True,
        ),
        "cluster_counts": listing(
            real(0, _MAX_COUNT, low_open=False, high_open=False, what="a count or share"),
            "numbers of clusters (or shares)",
            non_empty=True,
        ),
    },
    "rerandomize": {
        "covariates": listing(text, "column names", single=True, non_empty=True),
        "acceptance": real(0, 1, low_open=True, high_open=False, what="an acceptance probability"),
    },
    "exposure": {
        "bands_m": listing(_metres, "distances in metres", single=True, non_empty=True),
        "bands_ft": listing(
            real(0, _MAX_METRES / 0.3048, low_open=True, high_open=False, what="feet"),
            "distances in feet",
            single=True,
            non_empty=True,
        ),
        "metric": choice("euclidean", "network"),
        "snap_tolerance_m": real(0, 1000, low_open=False, high_open=False, what="metres"),
        "unit": choice("m", "ft"),
        "split_at_crossings": flag,
        "bridge_column": text,
        "accept_sparse_network": flag,
        "positivity_floor": real(0, 0.5, low_open=False, high_open=True, what="a probability"),
    },
    "field": {
        "district_column": text,
        "description_column": text,
        "instructions_column": text,
    },
}

TOP: dict[str, Check] = {
    "name": text,
    "seed": whole(0, _MAX_SEED, "a seed"),
    "draws": whole(MIN_DRAWS, MAX_DRAWS, "a number of Monte Carlo draws"),
}


def checked(data: dict[str, Any], source: str) -> dict[str, Any]:
    """Check every key of a spec's dict; return a copy with whole numbers as int."""
    out: dict[str, Any] = {}
    unknown = sorted(str(k) for k in data if k not in TOP and k not in SCHEMA)
    if unknown:
        raise DesignError(
            f"{source}: unknown top-level keys {unknown}; expected name, seed, draws and the "
            "tables [units], [eligible], [assignment], [rerandomize], [exposure], [field]"
        )
    for key, value in data.items():
        if value is None:  # a dict built in Python may say "not given" with None
            continue
        if key in TOP:
            out[key] = TOP[key](value, f"{source}: {key}")
            continue
        schema = SCHEMA[key]
        if not isinstance(value, dict):
            raise _fail(f"{source}: [{key}]", "a table", value)
        bad = sorted(str(k) for k in value if k not in schema)
        if bad:
            known = sorted(k for k in schema if not k.endswith("_ft"))
            raise DesignError(
                f"{source}: unknown key(s) {bad} in [{key}]; expected some of {known} "
                "(and bands_ft/gap_ft for distances in feet)"
            )
        out[key] = {
            k: schema[k](v, f"{source}: [{key}] {k}") for k, v in value.items() if v is not None
        }
    return out
