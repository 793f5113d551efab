"""The banded reach graph: the exposure graph cut to the outermost band, each pair with its band.

Every exposure kernel reads the same structure: the pairs of units within the
mapping's reach and, for each pair, the band its distance falls in. It is
built once per (graph, mapping) and shared, so the graph is filtered and
classified once however many kernels, chunks and tests read it.
"""

from __future__ import annotations

import weakref
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from geoexp.errors import InputError

if TYPE_CHECKING:
    from geoexp.exposure._mapping import ExposureMapping
    from geoexp.graph import ExposureGraph

# Reach graphs already built, per graph object and band edges (a graph is
# immutable, so its reach graph for given bands never changes).
_BUILT: weakref.WeakKeyDictionary = weakref.WeakKeyDictionary()


def band_codes(distances: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """Condition code of each distance: 1 + the number of band edges below it (int8).

    This is the one rule deciding which band a distance is in: bands are
    closed on the right (``side="left"``), so a distance equal to an edge
    belongs to the lower band, and the first band includes 0. Distances beyond
    the outermost band get ``edges.size + 1`` (pure control, i.e. not
    reached). The code is monotone in the distance, so the nearest treated
    unit's band is the smallest code among the treated neighbours: the kernels
    take minima of these one-byte codes instead of float distances.

    Parameters
    ----------
    distances : numpy.ndarray
        Distances in metres.
    edges : numpy.ndarray
        The outer edges of the bands in metres, increasing.

    Returns
    -------
    numpy.ndarray of int8
        The band code of each distance, from 1 (first band) to
        ``edges.size + 1`` (beyond every band), same shape as ``distances``.
    """
    edges = np.asarray(edges, dtype=np.float64)
    return (np.searchsorted(edges, distances, side="left") + 1).astype(np.int8)


@dataclass(frozen=True, eq=False)
class BandedReach:
    """Pairs within the outermost band, in the array types the kernels read.

    Attributes
    ----------
    indptr : numpy.ndarray
        int64 CSR row pointers, one row per unit.
    indices : numpy.ndarray
        int32 (int64 beyond 2**31 units) neighbour positions.
    distances : numpy.ndarray
        float64 distances in metres.
    codes : numpy.ndarray
        int8 band code of each pair (1..K; see :func:`band_codes`).
    edges : numpy.ndarray
        float64 band upper edges in metres.
    """

    indptr: np.ndarray
    indices: np.ndarray
    distances: np.ndarray
    codes: np.ndarray
    edges: np.ndarray

    @property
    def n_units(self) -> int:
        """Number of units (rows)."""
        return self.indptr.size - 1

    @property
    def n_conditions(self) -> int:
        """Treated, the K bands and pure control."""
        return self.edges.size + 2

    @classmethod
    def of(cls, graph: ExposureGraph, mapping: ExposureMapping) -> BandedReach:
        """The reach graph of ``graph`` for ``mapping``'s bands, built on first request.

        Raises
        ------
        InputError
            The graph measures distances differently from the mapping, or
            does not reach the outermost band.
        """
        if graph.metric != mapping.metric:
            raise InputError(
                f"the exposure bands are measured {mapping.metric!r} but the graph is "
                f"{graph.metric!r}; build the graph with the same metric"
            )
        if graph.max_distance + 1e-9 < mapping.reach:
            raise InputError(
                f"the graph holds pairs up to {graph.max_distance:g} m but the outermost spillover "
                f"band reaches {mapping.reach:g} m; build the graph with max_distance >= "
                f"{mapping.reach:g}"
            )
        built = _BUILT.setdefault(graph, {})
        key = tuple(mapping.band_edges)
        if key not in built:
            g = graph.within(mapping.reach) if graph.max_distance > mapping.reach else graph
            edges = np.asarray(mapping.band_edges, dtype=np.float64)
            index_type = np.int32 if max(graph.n, 1) < 2**31 else np.int64
            arrays = (
                np.ascontiguousarray(g.indptr, dtype=np.int64),
                np.ascontiguousarray(g.indices, dtype=index_type),
                np.ascontiguousarray(g.distances, dtype=np.float64),
                band_codes(g.distances, edges),
                edges,
            )
            for arr in arrays:
                arr.setflags(write=False)
            built[key] = cls(*arrays)
        return built[key]
