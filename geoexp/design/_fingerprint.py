"""A design's identity: one SHA-256 over everything that decides what the design does.

The spec's content hash alone does not identify a design: the same spec over a
different unit layer or a different exclusion-zone file treats other places.
The fingerprint covers

- the spec's canonical form without file paths (where a file lives is not
  what it holds; its content is covered below);
- the units: ids, geometry as WKB in the projected CRS the design works in,
  that CRS, and the columns the design reads (the eligibility rule's columns,
  the hot-spot column, block, cluster and rerandomization columns, and the
  columns field outputs show);
- the eligible units;
- the content of each exclusion-zone file (its CRS and geometries);
- the geoexp version that computed it.

Each part has its own SHA-256 so that a check can say which part changed; the
fingerprint is the SHA-256 of the parts' canonical JSON. It is printed as its
first 12 hex digits.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
import shapely

if TYPE_CHECKING:
    from geoexp.design._spec import DesignSpec
    from geoexp.units import UnitSet

__all__ = [
    "DesignFingerprint",
    "design_fingerprint",
    "frame_digest",
    "spec_identity",
    "tool_version",
    "unit_digests",
    "used_columns",
    "zone_digest",
]

_NAME = re.compile(r"`([^`]+)`|([A-Za-z_][A-Za-z0-9_]*)")


def tool_version() -> str:
    """The running geoexp version.

    Returns
    -------
    str
        ``geoexp.__version__`` of the installed package, as text.
    """
    import geoexp

    return str(geoexp.__version__)


def _sha(*chunks: bytes) -> str:
    h = hashlib.sha256()
    for chunk in chunks:
        h.update(len(chunk).to_bytes(8, "little"))
        h.update(chunk)
    return h.hexdigest()


def _canonical_json(value: Any) -> str:
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=False)


def spec_identity(spec: DesignSpec) -> dict[str, Any]:
    """The spec's canonical dict without file paths (their contents are fingerprinted apart).

    Parameters
    ----------
    spec : DesignSpec
        The design spec.

    Returns
    -------
    dict
        The spec as plain JSON values with the unit layer's ``path``, ``layer``
        and ``query`` removed, and the exclusion-zone list replaced by its
        length.
    """
    data = json.loads(_canonical_json(spec.to_dict()))
    units = data.get("units", {})
    units.pop("path", None)
    units.pop("layer", None)
    units.pop("query", None)  # like a path: where the rows come from, not what they are
    eligible = data.get("eligible", {})
    if "exclude" in eligible:
        eligible["exclude"] = len(eligible["exclude"])  # the zones' contents are a part apart
    return data


def used_columns(spec: DesignSpec, columns: Sequence[str]) -> tuple[str, ...]:
    """The unit columns the design reads, among ``columns``, in a fixed order.

    The eligibility rule is a pandas expression; every column name it mentions
    (plain or in backticks) counts as used.

    Parameters
    ----------
    spec : DesignSpec
        The design spec: its eligibility rule, hot-spot column, block, cluster
        and bridge columns, rerandomization covariates and field-sheet columns
        are read.
    columns : sequence of str
        The columns the unit layer has.

    Returns
    -------
    tuple of str
        The named columns present in ``columns`` (never ``geometry``), without
        repeats, sorted by name.
    """
    present = set(columns)
    names: list[str] = []
    if spec.eligible.where:
        for quoted, plain in _NAME.findall(spec.eligible.where):
            names.append(quoted or plain)
    a, f = spec.assignment, spec.field
    names += [
        n
        for n in (
            spec.eligible.top_column,
            a.block_column,
            a.cluster_column,
            spec.exposure.bridge_column,
        )
        if n
    ]
    if spec.rerandomize is not None:
        names += list(spec.rerandomize.covariates)
    names += [n for n in (f.district_column, f.description_column, f.instructions_column) if n]
    out: list[str] = []
    for name in names:
        if name and name in present and name != "geometry" and name not in out:
            out.append(name)
    return tuple(sorted(out))


def _values_bytes(values: pd.Series | pd.Index) -> bytes:
    """Canonical bytes of a column: kind tag, then fixed-width numbers or length-prefixed text."""
    values = pd.Series(np.asarray(values, dtype=object) if values.dtype == object else values)
    dtype = values.dtype
    if pd.api.types.is_bool_dtype(dtype) and not values.isna().any():
        return b"b" + values.to_numpy(dtype=np.uint8).tobytes()
    if pd.api.types.is_integer_dtype(dtype) and not values.isna().any():
        return b"i" + values.to_numpy(dtype="<i8").tobytes()
    if pd.api.types.is_numeric_dtype(dtype) and not pd.api.types.is_bool_dtype(dtype):
        arr = values.to_numpy(dtype="<f8", na_value=np.nan)
        arr = np.where(np.isnan(arr), np.nan, arr + 0.0)  # one NaN, and -0.0 as 0.0
        return b"f" + arr.astype("<f8").tobytes()
    missing = values.isna().to_numpy()
    raw = values.to_numpy(dtype=object)
    if all(isinstance(v, bytes) for v in raw[~missing]):  # WKB
        encoded = [b"" if m else v for v, m in zip(raw, missing, strict=True)]
    else:
        text = values.astype(object).map(str).to_numpy(dtype=object)
        encoded = [b"" if m else t.encode("utf-8") for t, m in zip(text, missing, strict=True)]
    lengths = np.fromiter(map(len, encoded), dtype="<i8", count=len(encoded))
    lengths[missing] = -1
    return b"s" + lengths.tobytes() + b"".join(encoded)


def frame_digest(frame: pd.DataFrame, *, index: bool = True) -> str:
    """SHA-256 of a table's column names and values (and its index), in order.

    Parameters
    ----------
    frame : pandas.DataFrame
        The table.
    index : bool, default True
        Whether the index values are part of the digest.

    Returns
    -------
    str
        The SHA-256 digest, 64 hexadecimal digits.
    """
    chunks = [_canonical_json([str(c) for c in frame.columns]).encode("utf-8")]
    if index:
        chunks.append(_values_bytes(frame.index))
    chunks += [_values_bytes(frame[c]) for c in frame.columns]
    return _sha(*chunks)


def _crs_identity(units: UnitSet) -> str:
    crs = units.crs
    if units.is_planar:
        # A GeoPackage gives an engineering CRS back in another WKT dialect; its
        # name and unit (the unit is hashed beside this) are what identify it.
        return f"planar:{crs.name}"
    authority = crs.to_authority() if crs is not None else None
    return ":".join(authority) if authority else (crs.to_wkt() if crs is not None else "")


def _wkb(units: UnitSet) -> np.ndarray:
    geoms = np.asarray(units.geometry.array, dtype=object)
    return shapely.to_wkb(geoms, byte_order=1, include_srid=False)


def zone_digest(path: str | os.PathLike[str]) -> str | None:
    """SHA-256 of an exclusion-zone file's CRS and geometries; None if the file is gone.

    Parameters
    ----------
    path : str or os.PathLike
        The exclusion-zone file (any format pyogrio reads).

    Returns
    -------
    str or None
        The SHA-256 digest of its CRS (authority code, else WKT) and its
        geometries as WKB, 64 hexadecimal digits; None if ``path`` does not
        exist.
    """
    import pyogrio

    path = Path(path)
    if not path.exists():
        return None
    frame = pyogrio.read_dataframe(path)
    crs = getattr(frame, "crs", None)
    authority = crs.to_authority() if crs is not None else None
    crs_text = ":".join(authority) if authority else (crs.to_wkt() if crs is not None else "")
    geoms = np.asarray(frame.geometry.array, dtype=object)
    wkb = shapely.to_wkb(geoms, byte_order=1, include_srid=False)
    return _sha(crs_text.encode("utf-8"), _values_bytes(pd.Series(wkb, dtype=object)))


@dataclass(frozen=True)
class DesignFingerprint:
    """A design's identity (see the module notes). ``str()`` gives the 12 printed hex digits.

    Attributes
    ----------
    digest : str
        SHA-256 (64 hex digits) of :attr:`parts`.
    parts : dict
        One SHA-256 per covered part: ``spec``, ``ids``, ``geometry`` (with
        the CRS), ``eligible``, ``columns`` (one per used column), ``zones``
        (one per exclusion-zone file, in the spec's order), and
        ``tool_version``.
    """

    digest: str
    parts: Mapping[str, Any]

    @property
    def short(self) -> str:
        """The first 12 hex digits, as printed."""
        return self.digest[:12]

    def __str__(self) -> str:
        return self.short

    def to_json(self) -> str:
        """The parts as canonical JSON (stored in trial files)."""
        return _canonical_json(dict(self.parts))

    @classmethod
    def from_parts(cls, parts: Mapping[str, Any]) -> DesignFingerprint:
        """The fingerprint of these parts."""
        parts = json.loads(_canonical_json(dict(parts)))
        return cls(_sha(_canonical_json(parts).encode("utf-8")), parts)

    @classmethod
    def from_json(cls, text: str) -> DesignFingerprint:
        """Read parts written by :meth:`to_json`."""
        return cls.from_parts(json.loads(text))


def design_fingerprint(
    spec: DesignSpec,
    units: UnitSet,
    eligible: np.ndarray,
    *,
    zone_digests: Sequence[str | None] | None = None,
    version: str | None = None,
) -> DesignFingerprint:
    """The fingerprint of a spec resolved against its units.

    Parameters
    ----------
    spec : DesignSpec
        The design spec (a pure value).
    units : UnitSet
        The units in the CRS the design works in.
    eligible : numpy.ndarray of bool
        Which units may be treated.
    zone_digests : sequence, optional
        Digests of the exclusion-zone files in the spec's order (default: read
        the files now; see :func:`zone_digest`).
    version : str, optional
        Tool version to record (default: the running geoexp's).

    Returns
    -------
    DesignFingerprint
        The SHA-256 digest of the parts and the parts themselves.
    """
    if zone_digests is None:
        zone_digests = [zone_digest(spec.resolve(z)) for z in spec.eligible.exclude]
    frame = units.frame
    columns = used_columns(spec, [c for c in frame.columns if c != "geometry"])
    parts = {
        "spec": _sha(_canonical_json(spec_identity(spec)).encode("utf-8")),
        "ids": _sha(units.id_column.encode("utf-8"), _values_bytes(units.ids)),
        "geometry": _sha(
            _crs_identity(units).encode("utf-8"),
            repr(float(units.metres_per_unit)).encode("utf-8"),
            _values_bytes(pd.Series(_wkb(units), dtype=object)),
        ),
        "eligible": _sha(np.asarray(eligible, dtype=np.uint8).tobytes()),
        "columns": {c: _sha(_values_bytes(frame[c])) for c in columns},
        "zones": list(zone_digests),
        "tool_version": tool_version() if version is None else version,
    }
    return DesignFingerprint.from_parts(parts)


def unit_digests(units: UnitSet, columns: Sequence[str]) -> pd.DataFrame:
    """Per unit, 64-bit hashes of its geometry and of its values in ``columns``.

    Kept beside the fingerprint so that a check can name the units that changed
    (the fingerprint itself is a SHA-256 over the whole layer).

    Parameters
    ----------
    units : UnitSet
        The units.
    columns : sequence of str
        The columns to hash (those the layer lacks are skipped).

    Returns
    -------
    pandas.DataFrame
        Indexed by unit id, with ``geometry_hash`` and ``columns_hash`` as
        signed 64-bit integers (``columns_hash`` is 0 when no column is
        present).
    """
    geometry = pd.util.hash_array(np.asarray(_wkb(units), dtype=object))
    present = [c for c in columns if c in units.frame.columns]
    if present:
        values = pd.util.hash_pandas_object(
            pd.DataFrame(units.frame[present]).astype(str), index=False
        ).to_numpy()
    else:
        values = np.zeros(units.n, dtype=np.uint64)
    return pd.DataFrame(
        {"geometry_hash": geometry.view(np.int64), "columns_hash": values.view(np.int64)},
        index=units.ids,
    )
