"""Plain street grids and parcel grids of any size, for benchmarks and tests.

The layers are invented: a regular lattice placed in an empty stretch of a
UTM zone (EPSG:32727), so that distances are metres.
"""

from __future__ import annotations

import math
from typing import Literal

import geopandas as gpd
import numpy as np
import shapely

from geoexp._rng import RngLike, as_generator
from geoexp.errors import InputError

__all__ = ["synthetic_grid"]

_CRS = "EPSG:32727"
# Lower-left corner of every grid: an arbitrary point well inside the zone, so
# coordinates look like real projected coordinates (large, positive).
_ORIGIN = (420_000.0, 7_350_000.0)


def synthetic_grid(
    n_units: int,
    *,
    kind: Literal["segment", "parcel"] = "segment",
    spacing: float = 100.0,
    jitter: float = 0.0,
    seed: RngLike = 0,
) -> gpd.GeoDataFrame:
    """Make a square-ish street grid or parcel grid with exactly ``n_units`` rows.

    Parameters
    ----------
    n_units : int
        Number of rows returned; the smallest square grid with at least this
        many units is built and then truncated (row by row, from the bottom).
    kind : {"segment", "parcel"}
        ``"segment"``: horizontal and vertical street segments between
        intersections ``spacing`` metres apart; neighbouring segments share
        their end points exactly. ``"parcel"``: square parcels
        ``0.3 * spacing`` wide on a lattice of pitch ``0.4 * spacing``, so
        with the default spacing they are 30 m wide with 10 m gaps for streets.
    spacing : float
        Block length in metres.
    jitter : float
        Standard deviation in metres of a normal displacement of each
        intersection (segments) or each parcel (parcels); 0 gives a perfect
        lattice. Displaced intersections stay shared by their segments.
    seed : None, int, SeedSequence or Generator
        Randomness for the jitter.

    Returns
    -------
    geopandas.GeoDataFrame
        Columns ``unit_id`` (int64, 1..n_units) and ``geometry``; CRS EPSG:32727.
    """
    if isinstance(n_units, bool) or not isinstance(n_units, (int, np.integer)) or n_units < 0:
        raise InputError(f"n_units must be a non-negative integer, got {n_units!r}")
    if kind not in ("segment", "parcel"):
        raise InputError(f"kind must be 'segment' or 'parcel', got {kind!r}")
    if not (math.isfinite(spacing) and spacing > 0):
        raise InputError(f"spacing must be a positive number of metres, got {spacing!r}")
    if not (math.isfinite(jitter) and jitter >= 0):
        raise InputError(f"jitter must be a non-negative number of metres, got {jitter!r}")
    n = int(n_units)
    rng = as_generator(seed)
    if n == 0:
        geometry = np.empty(0, dtype=object)
    elif kind == "segment":
        geometry = _segments(n, float(spacing), float(jitter), rng)
    else:
        geometry = _parcels(n, float(spacing), float(jitter), rng)
    return gpd.GeoDataFrame(
        {"unit_id": np.arange(1, n + 1, dtype=np.int64)}, geometry=geometry, crs=_CRS
    )


def _segments(n: int, spacing: float, jitter: float, rng: np.random.Generator) -> np.ndarray:
    # k x k intersections give 2 k (k - 1) segments; take the smallest k that suffices.
    k = max(2, math.ceil((1.0 + math.sqrt(1.0 + 2.0 * n)) / 2.0))
    node_i, node_j = np.meshgrid(np.arange(k), np.arange(k))
    nodes = np.column_stack([node_i.ravel(), node_j.ravel()]).astype(np.float64) * spacing
    nodes += _ORIGIN
    if jitter > 0:
        nodes += rng.normal(0.0, jitter, size=nodes.shape)

    # Segments are laid out row by row (the horizontal ones of row j, then the
    # vertical ones rising from row j) so that truncation trims the top edge
    # instead of dropping a whole orientation.
    block = 2 * k - 1
    n_total = (k - 1) * block + (k - 1)
    start = np.empty(n_total, dtype=np.int64)
    end = np.empty(n_total, dtype=np.int64)
    hi, hj = np.meshgrid(np.arange(k - 1), np.arange(k))
    hkey = (hj * block + hi).ravel()
    start[hkey] = (hj * k + hi).ravel()
    end[hkey] = (hj * k + hi + 1).ravel()
    vi, vj = np.meshgrid(np.arange(k), np.arange(k - 1))
    vkey = (vj * block + (k - 1) + vi).ravel()
    start[vkey] = (vj * k + vi).ravel()
    end[vkey] = ((vj + 1) * k + vi).ravel()

    start, end = start[:n], end[:n]
    coords = np.stack([nodes[start], nodes[end]], axis=1)
    return shapely.linestrings(coords)


def _parcels(n: int, spacing: float, jitter: float, rng: np.random.Generator) -> np.ndarray:
    k = math.ceil(math.sqrt(n))
    pitch, half = 0.4 * spacing, 0.15 * spacing
    col, row = np.divmod(np.arange(n), k)[::-1]
    centre_x = _ORIGIN[0] + col * pitch
    centre_y = _ORIGIN[1] + row * pitch
    if jitter > 0:
        shift = rng.normal(0.0, jitter, size=(2, n))
        centre_x = centre_x + shift[0]
        centre_y = centre_y + shift[1]
    return shapely.box(centre_x - half, centre_y - half, centre_x + half, centre_y + half)
