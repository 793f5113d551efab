"""GPS pings to stays at units: read in chunks, snap, group per device."""

from __future__ import annotations

import os

import numpy as np
import pandas as pd

from geoexp.delivery._pings import read_ping_chunks
from geoexp.delivery._snap import UnitIndex, snap_points
from geoexp.delivery._stays import (
    DEFAULT_MAX_GAP_S,
    DEFAULT_MAX_SPEED_KMH,
    DEFAULT_MIN_MINUTES,
    StayBuilder,
    StayRules,
)
from geoexp.delivery._table import StayTable
from geoexp.errors import InputError

DEFAULT_TOLERANCE_M = 25.0
DEFAULT_CHUNK_ROWS = 1_000_000
# Pieces of the units' outlines in the snapping index, in metres: short enough that few
# pieces are near a ping, long enough that the index stays small.
_PIECE_M = 25.0
# Points snapped at a time within a chunk (bounds the snapping's temporary arrays).
_SNAP_BLOCK = 250_000


def _snap_in_blocks(index: UnitIndex, x: np.ndarray, y: np.ndarray, tolerance: float):
    """Snap a chunk in blocks of ``_SNAP_BLOCK`` points: the same answer, a smaller peak.

    The exact snapping holds a few candidate pieces per point with their
    coordinates and distances (about 400 bytes a point at its peak); blocks keep
    that bounded whatever the chunk size.
    """
    unit = np.empty(len(x), dtype=np.int64)
    for start in range(0, len(x), _SNAP_BLOCK):
        stop = start + _SNAP_BLOCK
        unit[start:stop] = snap_points(index, x[start:stop], y[start:stop], tolerance)[0]
    return unit


def unit_index(units) -> UnitIndex:
    """The snapping index of a UnitSet (see :func:`stays_from_pings`).

    Parameters
    ----------
    units : geoexp.units.UnitSet
        The trial's units; ties between units are broken by ascending id.

    Returns
    -------
    UnitIndex
        Index for :func:`snap_points`, in the units' CRS.
    """
    geometry = units.geometry.to_numpy()
    order = np.argsort(np.asarray(units.ids), kind="stable")
    rank = np.empty(len(order), dtype=np.int64)
    rank[order] = np.arange(len(order))
    return UnitIndex.build(geometry, rank, _PIECE_M / units.metres_per_unit)


def stays_from_pings(
    pings: str | os.PathLike,
    units,
    *,
    device: str = "device",
    time: str = "time",
    x: str | None = None,
    y: str | None = None,
    lon: str | None = None,
    lat: str | None = None,
    crs: object = None,
    tolerance_m: float = DEFAULT_TOLERANCE_M,
    max_gap_s: float = DEFAULT_MAX_GAP_S,
    max_speed_kmh: float = DEFAULT_MAX_SPEED_KMH,
    min_minutes: float = DEFAULT_MIN_MINUTES,
    chunk_rows: int = DEFAULT_CHUNK_ROWS,
) -> StayTable:
    """Turn GPS pings into stays at units, reading the file in chunks.

    Each ping is snapped to the nearest unit within ``tolerance_m`` metres
    (exact distances, ties to the smallest id; see ``geoexp.delivery._snap``),
    the pings of each device are taken in time order, and runs of slow steps
    at one unit become stays (rules and their defaults in
    ``geoexp.delivery._stays``: at most ``max_gap_s`` seconds between pings,
    at most ``max_speed_kmh`` km/h, at least ``min_minutes`` minutes).

    Parameters
    ----------
    pings : path
        CSV (``.csv``, ``.txt``, ``.tsv``) or Parquet file, read ``chunk_rows``
        rows at a time with pyarrow.
    units : geoexp.units.UnitSet
        The trial's units (e.g. ``TrialFile.open(path).unit_set()``).
    device, time : str
        Columns of the device id and the time (ISO 8601 local clock time).
    x, y : str, optional
        Columns of the position's easting and northing in ``crs``.
    lon, lat : str, optional
        Columns of the position's longitude and latitude in decimal degrees
        (WGS 84, EPSG:4326), used instead of ``x``/``y``.
    crs : optional
        CRS of ``x``/``y``: anything pyproj accepts.
    tolerance_m : float
        Largest distance in metres between a ping and its unit. The default,
        25 m, covers the usual error of vehicle GPS in streets (5-15 m, more
        between tall buildings) plus half a street's width (common practice).
    max_gap_s : float
        Longest time in seconds between two pings of a stay (default 300 s).
    max_speed_kmh : float
        Fastest speed in km/h between two pings still counted as at rest
        (default 8 km/h).
    min_minutes : float
        Shortest stay kept, in minutes (default 2 minutes).
    chunk_rows : int
        Rows of the file read at a time, which bounds the memory used.

    Returns
    -------
    StayTable
    """
    if not (np.isfinite(tolerance_m) and tolerance_m >= 0):
        raise InputError(f"tolerance_m must be a finite number of metres >= 0, got {tolerance_m!r}")
    if (
        isinstance(chunk_rows, bool)
        or not isinstance(chunk_rows, (int, np.integer))
        or chunk_rows < 1
    ):
        raise InputError(f"chunk_rows must be a positive integer, got {chunk_rows!r}")
    rules = StayRules(float(max_gap_s), float(max_speed_kmh), float(min_minutes))
    index = unit_index(units)
    tolerance = tolerance_m / units.metres_per_unit
    chunks = read_ping_chunks(
        pings,
        units.crs,
        device=device,
        time=time,
        x=x,
        y=y,
        lon=lon,
        lat=lat,
        crs=crs,
        chunk_rows=int(chunk_rows),
    )
    codes: dict[str, int] = {}
    builder: StayBuilder | None = None
    found: list[dict] = []
    n = no_position = snapped = 0
    # One chunk at a time: a stay still open at a chunk's end is carried into the next, and
    # closed by finish() after the last, so no chunk is read ahead.
    for chunk in chunks:
        if builder is None:
            builder = StayBuilder(
                rules, units.metres_per_unit, "line" if chunk["row"][0] == 2 else "row"
            )
        lookup = np.array(
            [codes.setdefault(u, len(codes)) for u in chunk["device_names"]], dtype=np.int64
        )
        unit = _snap_in_blocks(index, chunk["x"], chunk["y"], tolerance)
        n += len(unit)
        no_position += int((~(np.isfinite(chunk["x"]) & np.isfinite(chunk["y"]))).sum())
        snapped += int((unit >= 0).sum())
        arrays = {
            "dev": lookup[chunk["device_code"]],
            "t": chunk["t"],
            "x": chunk["x"],
            "y": chunk["y"],
            "unit": unit,
            "row": chunk["row"],
        }
        del chunk
        found.append(builder.feed(arrays))
        del arrays, unit
    if builder is not None:
        found.append(builder.finish())
    names = np.array(list(codes), dtype=object)
    parts = {
        k: np.concatenate([f[k] for f in found]) if found else np.empty(0, np.int64)
        for k in ("dev", "unit", "start", "end", "pings")
    }
    frame = pd.DataFrame(
        {
            "unit": units.ids[parts["unit"]],
            "start": parts["start"].astype("datetime64[s]"),
            "end": parts["end"].astype("datetime64[s]"),
            "minutes": (parts["end"] - parts["start"]) / 60.0,
            "device": pd.Series(
                names[parts["dev"]] if len(names) else np.empty(0, dtype=object), dtype=object
            ),
            "activity": pd.Series([None] * len(parts["unit"]), dtype=object),
            "pings": parts["pings"],
        }
    ).sort_values(["start", "device"], kind="stable", ignore_index=True)
    summary = {
        "pings": f"{n:,}",
        "pings_without_position": f"{no_position:,}",
        "pings_snapped": f"{snapped:,} within {tolerance_m:g} m of a unit",
        "devices": f"{len(codes):,}",
        "rules": (
            f"gap <= {rules.max_gap_s:g} s, speed <= {rules.max_speed_kmh:g} km/h, "
            f"stay >= {rules.min_minutes:g} min"
        ),
    }
    return StayTable(frame, units.ids, os.fspath(pings), summary)
