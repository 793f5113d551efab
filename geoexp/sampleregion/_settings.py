"""Fixed settings and invented names of the sample city (every name is made up)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

CRS = "EPSG:32727"
ORIGIN = (500_000.0, 6_700_000.0)
ROTATION = np.deg2rad(11.0)  # a tilted grid reads less like a chessboard on a map
DEFAULT_SEED = 20261202
SNAP_DISTANCE_M = 30.0
LAYERS = ("segments", "parcels", "districts", "incidents", "features")
DEFAULT_PATH = Path(__file__).resolve().parents[2] / "sample_regions" / "quillmere.gpkg"

LAND_USES = ("residential", "commercial", "mixed", "industrial", "park")
INCIDENT_TYPES = (
    "burglary",
    "robbery",
    "assault",
    "vehicle theft",
    "theft from vehicle",
    "vandalism",
    "disorder",
)
# Rows follow LAND_USES, columns INCIDENT_TYPES; invented mixes, not estimates.
_TYPE_MIX = np.array(
    [
        [0.28, 0.06, 0.10, 0.12, 0.20, 0.14, 0.10],
        [0.10, 0.14, 0.14, 0.08, 0.24, 0.12, 0.18],
        [0.18, 0.10, 0.12, 0.10, 0.22, 0.13, 0.15],
        [0.20, 0.05, 0.06, 0.22, 0.20, 0.20, 0.07],
        [0.02, 0.12, 0.18, 0.05, 0.10, 0.23, 0.30],
    ]
)
# Relative incident risk by the segment's land use (invented).
_USE_RISK = np.array([1.0, 1.6, 1.3, 0.8, 0.6])

_TREES = (
    "Alder Aspen Beech Birch Buckeye Catalpa Cedar Chestnut Cypress Dogwood Elm Fir "
    "Ginkgo Hawthorn Hazel Hickory Holly Hornbeam Ironwood Juniper Larch Laurel "
    "Linden Locust Magnolia Maple Mulberry Oak Olive Pine Poplar Quince Redbud Rowan "
    "Sassafras Spruce Sycamore Tamarack Walnut Willow Yew Acacia"
).split()
# Invented surnames (syllable compounds), used once the tree names run out.
_SURNAMES = (
    "Ollerbeck Tramwell Fessick Penderrow Quarrington Vellacott Brimsby Dawlock "
    "Ettermore Gorrinde Hollisant Jemmerly Kestlow Lumbridge Morrowen Nettlefold "
    "Orrinshaw Pellisfar Rendacott Sorrowby Thimbleton Umberlane Varrick Wendlemoor"
).split()
_DISTRICTS = (
    # laid out on a 3 x 3 lattice of seeds, west to east, south to north; the
    # north-east seed is dropped so that its neighbours share the corner
    ("Tansy Reach", "Brindle Park", "Saltvale"),
    ("Weavers Row", "Old Ferrow", "Marlin Docks"),
    ("Quill Heights", "Upper Quillmere", None),
)
AVENUE_NAME = "Ferrow Blvd"
RIVER_NAME = "Quill River"
RAIL_NAME = "Tansy Line"

# Street kinds of edges in the working graph.
_GRID, _AVENUE, _BRIDGE, _STUB = 0, 1, 2, 3
