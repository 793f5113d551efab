"""The exposure graph: every pair of units within a maximum distance, with its distance in metres.

:class:`ExposureGraph` is a sparse symmetric matrix keyed by unit id. Build it
from a :class:`geoexp.units.UnitSet` (``ExposureGraph.from_units``) or from
bare geometries (``ExposureGraph.from_geometries``), with one of two metrics:

``"euclidean"``
    the distance between the geometries themselves (segment to segment,
    parcel edge to parcel edge), not between centroids;
``"network"``
    the shortest walk along the street network formed by the segment layer
    itself (Dijkstra, 1959), from the nearer end points of the two segments.

Memory grows with the number of pairs, never with the number of units squared.
"""

from geoexp.graph._diagnostics import NetworkDiagnostics
from geoexp.graph._graph import ExposureGraph, network_diagnostics
from geoexp.graph._noding import NetworkInfo, NetworkWarning

__all__ = [
    "ExposureGraph",
    "NetworkDiagnostics",
    "NetworkInfo",
    "NetworkWarning",
    "network_diagnostics",
]
