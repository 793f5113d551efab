"""The exposure mapping: one condition per unit under an assignment."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from geoexp.errors import InputError
from geoexp.exposure._reach import band_codes


@dataclass(frozen=True)
class ExposureMapping:
    """Treated, spillover band k, or pure control, by distance to the nearest treated unit.

    A unit that is treated is in condition ``treated`` whatever its neighbours.
    An untreated unit whose nearest treated unit lies within band ``k`` is in
    ``spillover_k``; bands are closed on the right, the first one includes 0
    (so with ``band_edges=(150, 300)`` the bands are [0, 150] and (150, 300]
    metres). An untreated unit with no treated unit within the last edge is a
    ``pure_control``. This is the distance-band exposure mapping of Aronow &
    Samii (2017), with conditions chosen so that each unit has exactly one.

    Parameters
    ----------
    band_edges
        Upper edges of the spillover bands in metres, strictly increasing.
    metric
        Distance the bands are measured in: straight line between geometries
        or along the street network.
    unit
        Unit the labels show the band edges in: ``"m"`` (metres) or ``"ft"``
        (international feet). The edges themselves are always metres.
    """

    band_edges: tuple[float, ...] = (150.0, 300.0)
    metric: str = "euclidean"
    unit: str = "m"

    def __post_init__(self) -> None:
        edges = tuple(float(e) for e in self.band_edges)
        if len(edges) == 0:
            raise InputError("an exposure mapping needs at least one spillover band edge (metres)")
        if any(not np.isfinite(e) or e <= 0 for e in edges):
            raise InputError(f"spillover band edges must be positive metres, got {list(edges)}")
        if any(b <= a for a, b in zip(edges, edges[1:], strict=False)):
            raise InputError(f"spillover band edges must increase strictly, got {list(edges)}")
        if self.metric not in ("euclidean", "network"):
            raise InputError(f"metric must be 'euclidean' or 'network', got {self.metric!r}")
        if self.unit not in ("m", "ft"):
            raise InputError(f"unit must be 'm' or 'ft', got {self.unit!r}")
        object.__setattr__(self, "band_edges", edges)

    @classmethod
    def from_edges(cls, edges: Sequence[float], metric: str = "euclidean") -> ExposureMapping:
        """Build a mapping from band upper edges in metres."""
        return cls(tuple(edges), metric)

    @property
    def n_bands(self) -> int:
        """Number of spillover bands."""
        return len(self.band_edges)

    @property
    def n_conditions(self) -> int:
        """Number of exposure conditions (treated, each band, pure control)."""
        return self.n_bands + 2

    @property
    def reach(self) -> float:
        """Largest distance (metres) at which a treated unit changes another unit's condition."""
        return self.band_edges[-1]

    @property
    def pure_control(self) -> int:
        """Code of the pure-control condition."""
        return self.n_bands + 1

    @property
    def codes(self) -> tuple[str, ...]:
        """Short machine names of the conditions, in code order."""
        return ("treated", *(f"spillover_{k + 1}" for k in range(self.n_bands)), "pure_control")

    @property
    def labels(self) -> tuple[str, ...]:
        """Human labels of the conditions, stating their distances in metres."""
        scale = 1.0 if self.unit == "m" else 1 / 0.3048
        edges = tuple(round(e * scale, 2) for e in self.band_edges)
        lows = (0.0, *edges[:-1])
        bands = tuple(
            f"spillover {lo:g}-{hi:g} {self.unit}" for lo, hi in zip(lows, edges, strict=True)
        )
        return ("treated", *bands, "pure control")

    def code(self, condition: str | int) -> int:
        """Return the integer code of a condition given by name, label or code."""
        if isinstance(condition, (int, np.integer)):
            if 0 <= int(condition) < self.n_conditions:
                return int(condition)
        elif condition in self.codes:
            return self.codes.index(condition)
        elif condition in self.labels:
            return self.labels.index(condition)
        raise InputError(
            f"unknown exposure condition {condition!r}; expected one of {list(self.codes)}"
        )

    def band_of(self, distance: np.ndarray) -> np.ndarray:
        """Condition codes (1..K, or pure control) of untreated units at ``distance`` metres."""
        return band_codes(distance, np.asarray(self.band_edges))
