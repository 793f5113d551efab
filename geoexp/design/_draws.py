"""Many assignments at once, stored as a CSR of treated positions.

One draw is a short list of treated positions, so R draws are kept as a CSR
matrix pattern (row r = draw r) rather than an R x n dense matrix: memory is
proportional to the number of treated units times R, not to the layer size.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from geoexp.errors import InputError

__all__ = ["Draws"]


def _frozen(array: np.ndarray) -> np.ndarray:
    array.flags.writeable = False
    return array


@dataclass(frozen=True, eq=False)
class Draws:
    """R assignments as a CSR of treated positions.

    Row ``r`` lists the positions (in the full unit layer, ``0..n_units-1``)
    treated in draw ``r``, in ascending order.

    Parameters
    ----------
    indptr : numpy.ndarray
        int64, shape (R + 1,): row pointers; draw ``r`` is
        ``indices[indptr[r]:indptr[r + 1]]``.
    indices : numpy.ndarray
        int32, treated positions of all draws one after the other.
    n_units : int
        Number of units in the full layer.
    extra : mapping of str to numpy.ndarray
        Optional per-draw records whose first axis has length R, e.g.
        ``"cluster_level"`` (R x C) for randomized-saturation designs.
    """

    indptr: np.ndarray
    indices: np.ndarray
    n_units: int
    extra: Mapping[str, np.ndarray] = field(default_factory=dict)

    def __post_init__(self) -> None:
        indptr = np.array(self.indptr, dtype=np.int64)
        indices = np.array(self.indices, dtype=np.int32)
        n_units = int(self.n_units)
        if indptr.ndim != 1 or indptr.size < 1 or indptr[0] != 0:
            raise InputError("Draws.indptr must be a 1-D array starting at 0")
        if np.any(np.diff(indptr) < 0) or indptr[-1] != indices.size:
            raise InputError(
                "Draws.indptr must be non-decreasing and end at len(indices) "
                f"({indices.size}), got last value {indptr[-1]}"
            )
        if indices.size and (indices.min() < 0 or indices.max() >= n_units):
            raise InputError(f"Draws.indices must be positions in 0..{n_units - 1}")
        n_draws = indptr.size - 1
        extra = {}
        for key, value in dict(self.extra).items():
            value = np.array(value)
            if value.ndim < 1 or value.shape[0] != n_draws:
                raise InputError(
                    f"Draws.extra[{key!r}] must have one row per draw ({n_draws}), "
                    f"got shape {value.shape}"
                )
            extra[key] = _frozen(value)
        object.__setattr__(self, "indptr", _frozen(indptr))
        object.__setattr__(self, "indices", _frozen(indices))
        object.__setattr__(self, "n_units", n_units)
        object.__setattr__(self, "extra", extra)

    @classmethod
    def _owned(cls, indptr, indices, n_units, extra=None) -> Draws:
        """Wrap freshly made, already valid arrays without copying or re-checking them."""
        draws = object.__new__(cls)
        object.__setattr__(draws, "indptr", _frozen(np.asarray(indptr, dtype=np.int64)))
        object.__setattr__(draws, "indices", _frozen(np.asarray(indices, dtype=np.int32)))
        object.__setattr__(draws, "n_units", int(n_units))
        object.__setattr__(
            draws, "extra", {k: _frozen(np.asarray(v)) for k, v in (extra or {}).items()}
        )
        return draws

    @property
    def n_draws(self) -> int:
        """Number of draws R."""
        return self.indptr.size - 1

    @property
    def counts(self) -> np.ndarray:
        """Number of treated units in each draw, shape (R,)."""
        return np.diff(self.indptr)

    def __len__(self) -> int:
        return self.n_draws

    def treated(self, r: int) -> np.ndarray:
        """Return the ascending treated positions of draw ``r`` (a read-only view)."""
        if not -self.n_draws <= r < self.n_draws:
            raise IndexError(f"draw {r} out of range for {self.n_draws} draws")
        r = r % self.n_draws
        return self.indices[self.indptr[r] : self.indptr[r + 1]]

    def to_dense(self) -> np.ndarray:
        """Return a boolean (R, n_units) matrix; meant for tests and small layers."""
        dense = np.zeros((self.n_draws, self.n_units), dtype=bool)
        rows = np.repeat(np.arange(self.n_draws), self.counts)
        dense[rows, self.indices] = True
        return dense

    def take(self, rows: np.ndarray | Sequence[int]) -> Draws:
        """Return a new Draws holding the draws ``rows`` in the given order."""
        rows = np.asarray(rows, dtype=np.int64).reshape(-1)
        lengths = self.counts[rows]
        indptr = np.zeros(rows.size + 1, dtype=np.int64)
        np.cumsum(lengths, out=indptr[1:])
        # Position k of the output comes from indptr[row] + (k - start of its output row).
        source = np.repeat(self.indptr[rows] - indptr[:-1], lengths) + np.arange(indptr[-1])
        extra = {key: value[rows] for key, value in self.extra.items()}
        return Draws._owned(indptr, self.indices[source], self.n_units, extra)

    def equals(self, other: Draws) -> bool:
        """Return True when ``other`` holds exactly the same draws and records."""
        return (
            self.n_units == other.n_units
            and np.array_equal(self.indptr, other.indptr)
            and np.array_equal(self.indices, other.indices)
            and self.extra.keys() == other.extra.keys()
            and all(np.array_equal(v, other.extra[k]) for k, v in self.extra.items())
        )

    @classmethod
    def concat(cls, parts: Sequence[Draws]) -> Draws:
        """Stack the draws of ``parts`` one after the other.

        Parameters
        ----------
        parts : sequence of Draws
            At least one; all over the same number of units and with the same
            ``extra`` records.

        Returns
        -------
        Draws
        """
        parts = list(parts)
        if not parts:
            raise InputError("Draws.concat needs at least one part")
        if len(parts) == 1:
            return parts[0]  # immutable, so sharing is safe
        n_units = parts[0].n_units
        keys = parts[0].extra.keys()
        for part in parts[1:]:
            if part.n_units != n_units or part.extra.keys() != keys:
                raise InputError(
                    "Draws.concat: parts differ in n_units or extra records "
                    f"({part.n_units} vs {n_units}; {sorted(part.extra)} vs {sorted(keys)})"
                )
        offsets = np.cumsum([0] + [p.indices.size for p in parts[:-1]])
        indptr = np.concatenate(
            [np.zeros(1, np.int64)]
            + [p.indptr[1:] + off for p, off in zip(parts, offsets, strict=True)]
        )
        indices = np.concatenate([p.indices for p in parts])
        extra = {key: np.concatenate([p.extra[key] for p in parts]) for key in keys}
        return cls._owned(indptr, indices, n_units, extra)

    @classmethod
    def from_rows(cls, positions: np.ndarray, n_units: int, extra=None) -> Draws:
        """Build Draws from an (R, m) array whose row r holds draw r's treated positions."""
        # int32 sorts faster and is the storage type anyway
        positions = np.sort(np.asarray(positions, dtype=np.int32), axis=1)
        n_draws, m = positions.shape
        if positions.size and (positions.min() < 0 or positions.max() >= n_units):
            raise InputError(f"positions must lie in 0..{n_units - 1}")
        extra = dict(extra or {})
        if any(np.shape(v)[:1] != (n_draws,) for v in extra.values()):
            raise InputError(f"every extra record needs one row per draw ({n_draws})")
        indptr = np.arange(n_draws + 1, dtype=np.int64) * m
        return cls._owned(indptr, positions.reshape(-1), n_units, extra)

    def __repr__(self) -> str:
        extra = f", extra={sorted(self.extra)}" if self.extra else ""
        return f"Draws(n_draws={self.n_draws}, n_units={self.n_units}{extra})"
