"""Invented incidents for the period of a demo trial, with an effect planted on purpose.

Only for demonstrations and tests: the sample city has two years of invented
incidents (2024 and 2025); a demo trial needs a period after the assignment.
The simulated year keeps each segment's level of risk (its mean count over
the two years) and multiplies it by a factor for each exposure condition, so
that the analysis has a known answer to find.
"""

from __future__ import annotations

from collections.abc import Mapping

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

from geoexp._rng import RngLike, as_generator
from geoexp.errors import InputError
from geoexp.sampleregion._city import SampleRegion
from geoexp.sampleregion._settings import INCIDENT_TYPES

# Demo effects: a 30% reduction on treated segments and a 10% diffusion of
# benefits within the first band; nothing further out.
DEMO_MULTIPLIERS = {"treated": 0.7, "spillover_1": 0.9}


def simulate_trial_incidents(
    region: SampleRegion,
    conditions: pd.Series,
    *,
    start: str = "2026-01-01",
    end: str = "2026-12-31",
    multipliers: Mapping[str, float] | None = None,
    rng: RngLike = 20261202,
) -> gpd.GeoDataFrame:
    """Invented incident points for a trial period, with planted effects by condition.

    Parameters
    ----------
    region
        The sample city.
    conditions
        Exposure condition code per segment id (e.g. ``"treated"``,
        ``"spillover_1"``, ``"pure_control"``), as in a trial's assignment.
    start, end
        The period, both days included.
    multipliers
        Factor on each condition's expected count (default :data:`DEMO_MULTIPLIERS`);
        conditions not named keep their level.
    rng
        Seed or generator.

    Returns
    -------
    GeoDataFrame
        Points with ``incident_id``, ``date`` and ``incident_type``, in the city's CRS.
    """
    gen = as_generator(rng)
    seg = region.segments
    cond = conditions.reindex(seg["segment_id"]).to_numpy()
    if pd.isna(cond).any():
        raise InputError("conditions must give a condition for every segment of the region")
    factors = dict(DEMO_MULTIPLIERS if multipliers is None else multipliers)
    mult = np.array([factors.get(c, 1.0) for c in cond])
    days = pd.date_range(start, end, freq="D")
    rate = (seg["incidents_y1"].to_numpy() + seg["incidents_y2"].to_numpy()) / 2.0
    rate = (rate + 0.05) * len(days) / 365.0 * mult
    counts = gen.poisson(rate)
    owner = np.repeat(np.arange(len(seg)), counts)
    lines = seg.geometry.to_numpy()[owner]
    along = gen.uniform(0.05, 0.95, owner.size)
    points = shapely.line_interpolate_point(lines, along, normalized=True)
    offset = gen.uniform(-8.0, 8.0, (owner.size, 2))
    xy = shapely.get_coordinates(points) + offset
    frame = gpd.GeoDataFrame(
        {
            "incident_id": [f"T{i:06d}" for i in range(owner.size)],
            "date": days[gen.integers(0, len(days), owner.size)].normalize(),
            "incident_type": np.asarray(INCIDENT_TYPES, dtype=object)[
                gen.integers(0, len(INCIDENT_TYPES), owner.size)
            ],
        },
        geometry=gpd.points_from_xy(xy[:, 0], xy[:, 1]),
        crs=seg.crs,
    )
    return frame.sort_values(["date", "incident_id"], kind="stable").reset_index(drop=True)
