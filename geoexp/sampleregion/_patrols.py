"""Invented patrol tracks: GPS pings of devices that drive between places and stop at some.

Each device alternates driving (at about 30 km/h along a straight line) and
stopping (GPS fixes scattered a few metres around a point on a unit). The
next stop is a random walk from the last one, snapped to the nearest unit's
midpoint, so devices stay in a neighbourhood as patrols do. A share of the stops
can go to ``favoured`` units instead (the planned places). Everything is
generated on whole arrays; the tracks are invented and only for tests,
benchmarks and the demo.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import shapely
from scipy.spatial import cKDTree

from geoexp._rng import RngLike, as_generator
from geoexp.errors import InputError

__all__ = ["simulate_pings"]


def simulate_pings(
    geometry,
    n_pings: int,
    *,
    n_devices: int = 50,
    interval_s: float = 30.0,
    mean_stop_pings: float = 20.0,
    walk_m: float = 400.0,
    gps_error_m: float = 4.0,
    favoured: np.ndarray | None = None,
    favour_share: float = 0.0,
    start: str = "2025-01-06T00:00:00",
    rng: RngLike = 0,
) -> pd.DataFrame:
    """Simulate about ``n_pings`` pings of ``n_devices`` patrol devices over units.

    Parameters
    ----------
    geometry : array of shapely geometries
        The units (metre CRS).
    n_pings : int
        Number of pings wanted (the result has exactly this many rows).
    n_devices : int
        Devices, each reporting every ``interval_s`` seconds (with a little jitter).
    interval_s : float
        Seconds between two pings of a device.
    mean_stop_pings : float
        Mean number of pings of a stop (geometric).
    walk_m : float
        Standard deviation of the step, in metres, from one stop to the next.
    gps_error_m : float
        Standard deviation of a fix around the true position, in metres.
    favoured : array of int, optional
        Positions of units patrols are sent to (the treated places of a plan).
    favour_share : float
        Share of stops made at a randomly chosen favoured unit instead of the
        next unit of the random walk (0 to 1); the rest of the stops are
        where the walk leads, so some favoured units are under-served and
        some other units are visited, as in a trial with imperfect delivery.
    start : str
        Time of the first ping (local clock).
    rng : None, int, SeedSequence or Generator
        Seed or generator of the simulation (normalised by ``geoexp._rng``).

    Returns
    -------
    pandas.DataFrame
        ``device`` (text), ``time`` (datetime64[s]), ``x``, ``y`` (the units'
        CRS), ``stop`` (the position of the unit the device was stopped at,
        -1 while driving); sorted by time, then device.
    """
    if n_pings < 0 or n_devices < 1:
        raise InputError("n_pings must be >= 0 and n_devices >= 1")
    rng = as_generator(rng)
    geometry = np.asarray(geometry)
    mid = shapely.get_coordinates(
        shapely.line_interpolate_point(
            shapely.boundary(geometry) if shapely.get_type_id(geometry[0]) in (3, 6) else geometry,
            0.5,
            normalized=True,
        )
    )
    tree = cKDTree(mid)
    lo, hi = mid.min(axis=0), mid.max(axis=0)
    per_device = -(-n_pings // n_devices)
    # Legs: a drive then a stop; enough of them that every device fills its pings.
    n_legs = int(per_device / (mean_stop_pings + 6) * 1.5) + 4
    steps = rng.normal(0.0, walk_m, size=(n_devices, n_legs, 2))
    origin = rng.uniform(lo, hi, size=(n_devices, 1, 2))
    span = np.maximum(hi - lo, 1.0)
    walk = lo + np.abs(((origin + np.cumsum(steps, axis=1)) - lo + span) % (2 * span) - span)
    _, stop_unit = tree.query(walk.reshape(-1, 2))
    if favoured is not None and len(favoured) and favour_share > 0:
        if not 0 <= favour_share <= 1:
            raise InputError(f"favour_share must be between 0 and 1, got {favour_share!r}")
        sent = rng.random(stop_unit.size) < favour_share
        stop_unit[sent] = rng.choice(np.asarray(favoured), int(sent.sum()))
    target = mid[stop_unit].reshape(n_devices, n_legs, 2)
    before = np.concatenate([target[:, :1], target[:, :-1]], axis=1)
    length = np.hypot(*(target - before).transpose(2, 0, 1))
    drive = np.maximum(1, np.ceil(length / (8.3 * interval_s))).astype(np.int64)
    stop = rng.geometric(1.0 / mean_stop_pings, size=(n_devices, n_legs))
    # Per leg: `drive` pings moving from `before` to `target`, then `stop` pings at `target`.
    counts = np.stack([drive, stop], axis=2).reshape(-1)
    kind = np.tile([0, 1], n_devices * n_legs)
    leg = np.repeat(np.arange(counts.size), counts)
    k = np.arange(leg.size) - np.repeat(np.cumsum(counts) - counts, counts)
    frac = (k + 1) / counts[leg]
    pair = leg // 2
    a, b = before.reshape(-1, 2)[pair], target.reshape(-1, 2)[pair]
    moving = kind[leg] == 0
    pos = np.where(moving[:, None], a + (b - a) * frac[:, None], b)
    pos = pos + rng.normal(0.0, gps_error_m, size=pos.shape)
    device = pair // n_legs
    # Keep the first `per_device` pings of each device.
    first = np.searchsorted(device, np.arange(n_devices))
    index_in_device = np.arange(device.size) - first[device]
    keep = index_in_device < per_device
    pos, device, index_in_device = pos[keep], device[keep], index_in_device[keep]
    unit_at = np.where(moving[keep], -1, stop_unit[pair[keep]])
    jitter = rng.uniform(-2.0, 2.0, size=device.size)
    seconds = np.round(
        index_in_device * interval_s + jitter + rng.uniform(0, interval_s, n_devices)[device]
    )
    time = np.datetime64(start, "s") + seconds.astype(np.int64)
    frame = pd.DataFrame(
        {
            "device": np.char.add("car-", np.char.zfill(device.astype(str), 3)).astype(object),
            "time": time,
            "x": pos[:, 0],
            "y": pos[:, 1],
            "stop": unit_at,
        }
    )
    frame = frame.sort_values(["time", "device"], kind="stable", ignore_index=True)
    return frame.iloc[:n_pings].reset_index(drop=True)
