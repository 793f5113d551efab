"""Is the street network plausible? Components, units without neighbours, and sparseness.

Along streets, two units are never closer than in a straight line, so the
pairs within a distance along streets are a subset of the pairs within it in
a straight line. On a connected street grid the along-street pairs within a
band are roughly half or more of the straight-line ones (a walk on a grid is
at most about 1.4 times the straight line); far fewer means the network is
broken up, most often because the lines were not split where streets cross.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.sparse.csgraph import connected_components

from geoexp._engine import Engine
from geoexp.graph import _euclidean, _network, _noding
from geoexp.graph._noding import NetworkInfo

# Warn when the along-street pairs are fewer than this share of the straight-line
# pairs within the outer band (a connected grid gives about 0.5 or more).
SPARSE_SHARE = 0.25
# Warn when more than this share of units has no neighbour along streets but
# has one in a straight line.
STRANDED_SHARE = 0.10
# Warn when more than this share of units lies outside the largest component.
OUTSIDE_SHARE = 0.05


@dataclass(frozen=True)
class NetworkDiagnostics:
    """What the street network looks like within the outer band.

    Attributes
    ----------
    max_distance : float
        The outer band, metres.
    n_units : int
        Units (street segments).
    n_components : int
        Connected pieces of the street network.
    largest_component_units : int
        Units in the largest piece.
    isolated : pandas.Index
        Ids of units with no other unit within ``max_distance`` along streets.
    stranded : pandas.Index
        Ids of isolated units that do have a neighbour within ``max_distance``
        in a straight line.
    network_pairs, straight_pairs : int
        Pairs of units within ``max_distance`` along streets and in a straight line.
    network : NetworkInfo
        Meeting points found and how the network was formed.
    warnings : tuple of str
        Plain sentences, each saying what looks wrong and what to do.
    """

    max_distance: float
    n_units: int
    n_components: int
    largest_component_units: int
    isolated: pd.Index
    stranded: pd.Index
    network_pairs: int
    straight_pairs: int
    network: NetworkInfo
    warnings: tuple[str, ...]

    @property
    def sparse(self) -> bool:
        """True when the along-street pairs are implausibly few (below ``SPARSE_SHARE``)."""
        return self.ratio < SPARSE_SHARE

    @property
    def ratio(self) -> float:
        """Along-street pairs over straight-line pairs within the outer band (1.0 if none)."""
        return self.network_pairs / self.straight_pairs if self.straight_pairs else 1.0

    def __str__(self) -> str:
        lines = [
            f"Street network of {self.n_units:,} segments: {self.n_components:,} connected "
            f"components, the largest with {self.largest_component_units:,} segments.",
            f"Within {self.max_distance:g} m: {self.network_pairs:,} pairs along streets, "
            f"{self.straight_pairs:,} in a straight line ({self.ratio:.0%}); "
            f"{len(self.isolated):,} segments have no neighbour along streets "
            f"({len(self.stranded):,} of them have one in a straight line).",
            self.network.describe(),
        ]
        return "\n".join([*lines, *(f"Warning: {w}" for w in self.warnings)])

    def to_dict(self) -> dict:
        """Plain values for a report or a trial's record."""
        return {
            "max_distance_m": self.max_distance,
            "n_units": self.n_units,
            "n_components": self.n_components,
            "largest_component_units": self.largest_component_units,
            "isolated_units": len(self.isolated),
            "stranded_units": len(self.stranded),
            "network_pairs": self.network_pairs,
            "straight_pairs": self.straight_pairs,
            "ratio": self.ratio,
            "network": self.network.to_dict(),
            "warnings": list(self.warnings),
        }


def diagnose(
    geoms: np.ndarray,
    ids: pd.Index,
    max_distance: float,
    scale: float,
    snap_tolerance: float,
    *,
    split_at_crossings: bool,
    grade_separated: np.ndarray | None,
    engine: Engine,
    network_pairs: tuple[np.ndarray, np.ndarray] | None = None,
) -> NetworkDiagnostics:
    """Diagnose the network of ``geoms`` (lines in CRS units, ``scale`` metres per unit).

    ``network_pairs`` reuses the (first, second) positions of an along-street
    graph already built to ``max_distance`` with the same settings.
    """
    n = len(geoms)
    pieces, owner, info = _noding.pieces_of(
        geoms,
        scale,
        snap_tolerance,
        split_at_crossings=split_at_crossings,
        grade_separated=grade_separated,
    )
    net = _network.street_network(pieces, scale, snap_tolerance)
    _, node_label = connected_components(net["graph"], directed=False)
    # Every piece of a unit lies in the unit's component (the unit joins them).
    piece_label = node_label[net["seg_node"][:, 0]]
    first_piece = np.searchsorted(owner, np.arange(n))
    unit_label = piece_label[first_piece]
    sizes = np.bincount(np.unique(unit_label, return_inverse=True)[1].ravel())
    n_components = int(sizes.size)
    largest = int(sizes.max()) if sizes.size else 0

    if network_pairs is None:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", _noding.NetworkWarning)
            a, b, _, _ = _noding.noded_pairs(
                geoms,
                max_distance,
                scale,
                snap_tolerance,
                engine,
                split_at_crossings=split_at_crossings,
                grade_separated=grade_separated,
            )
    else:
        a, b = network_pairs
    sa, sb, _ = _euclidean.euclidean_pairs(geoms, max_distance, scale)
    has_net = np.zeros(n, dtype=bool)
    has_net[a] = has_net[b] = True
    has_straight = np.zeros(n, dtype=bool)
    has_straight[sa] = has_straight[sb] = True
    isolated = ~has_net
    stranded = isolated & has_straight

    warn: list[str] = []
    n_net, n_straight = len(a), len(sa)
    ratio = n_net / n_straight if n_straight else 1.0
    if n_straight and ratio < SPARSE_SHARE:
        warn.append(
            f"only {n_net:,} pairs of segments are within {max_distance:g} m along streets, "
            f"{ratio:.0%} of the {n_straight:,} pairs within {max_distance:g} m in a straight "
            f"line (below {SPARSE_SHARE:.0%}, which a connected street network does not give): "
            "the along-street distances are implausible. " + _advice(info)
        )
    if stranded.sum() > STRANDED_SHARE * n:
        warn.append(
            f"{int(stranded.sum()):,} of {n:,} segments ({stranded.sum() / n:.0%}) have no "
            f"neighbour within {max_distance:g} m along streets but do have one in a straight "
            "line. " + _advice(info)
        )
    if n and n - largest > OUTSIDE_SHARE * n:
        warn.append(
            f"the street network falls into {n_components:,} separate pieces; "
            f"{n - largest:,} of {n:,} segments ({(n - largest) / n:.0%}) lie outside the "
            "largest, and no walk joins them to it. Check for gaps larger than the snap "
            f"tolerance ({snap_tolerance:g} m) where streets should meet. " + _advice(info)
        )
    if not split_at_crossings and info.many_away and not warn:
        warn.append(_noding.not_noded_warning(info))
    return NetworkDiagnostics(
        max_distance=float(max_distance),
        n_units=n,
        n_components=n_components,
        largest_component_units=largest,
        isolated=ids[isolated],
        stranded=ids[stranded],
        network_pairs=n_net,
        straight_pairs=n_straight,
        network=info,
        warnings=tuple(warn),
    )


def _advice(info: NetworkInfo) -> str:
    if not info.split_at_crossings and info.away_from_ends:
        return (
            f"The lines meet {info.away_from_ends:,} times away from their end points "
            f"({info.crossings:,} crossings, {info.touches:,} touches): split them there "
            "(split_at_crossings=True, with bridges and tunnels marked), or use the euclidean "
            "metric."
        )
    return (
        "Check the layer in a GIS (gaps, missing connections), raise the snap tolerance if "
        "end points that should meet are a little apart, or use the euclidean metric."
    )
