"""Benchmark: 1M incidents onto 100k street segments, beside a baseline measured in the same run.

Baseline: shapely's ``STRtree.query_nearest(max_distance=...)`` alone, the usual
one-call way to snap points, which does not even count. Run:
``python benchmarks/outcome_counts.py``.
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

from geoexp.outcomes import count_incidents
from geoexp.sampleregion import synthetic_grid
from geoexp.units import UnitSet

N_INCIDENTS = 1_000_000
PERIODS = dict(pre=("2024-01-01", "2024-12-31"), post=("2025-01-01", "2025-12-31"))


def best(f, k=2):
    """Best of ``k`` timings of ``f()`` and its result."""
    times, out = [], None
    for _ in range(k):
        t = time.perf_counter()
        out = f()
        times.append(time.perf_counter() - t)
    return min(times), out


def main() -> None:
    grid = synthetic_grid(100_000, jitter=5.0, seed=1)
    units = UnitSet.from_frame(grid, "unit_id")
    rng = np.random.default_rng(0)
    xmin, ymin, xmax, ymax = grid.total_bounds
    x = rng.uniform(xmin, xmax, N_INCIDENTS)
    y = rng.uniform(ymin, ymax, N_INCIDENTS)
    dates = np.datetime64("2024-01-01") + rng.integers(0, 731, N_INCIDENTS)
    kinds = np.array(["burglary", "robbery", "vandalism", "assault"], dtype=object)
    types = kinds[rng.integers(0, 4, N_INCIDENTS)]
    inc = gpd.GeoDataFrame(
        {"date": dates.astype("datetime64[ns]"), "kind": types},
        geometry=shapely.points(x, y),
        crs=grid.crs,
    )
    kw = dict(date_column="date", tolerance_m=30.0, **PERIODS)

    t_count, table = best(lambda: count_incidents(units, inc, **kw))
    t_type, _ = best(lambda: count_incidents(units, inc, type_column="kind", by_type=True, **kw))
    geoms = np.asarray(grid.geometry.array, dtype=object)
    points = shapely.points(x, y)
    t_near, _ = best(
        lambda: shapely.STRtree(geoms).query_nearest(
            points, max_distance=30.0, return_distance=True, all_matches=True
        ),
        k=1,
    )
    print(table.drops)
    print(f"count_incidents, 1M incidents onto 100k segments: {t_count:.2f} s")
    print(f"  with by_type (4 types):                         {t_type:.2f} s")
    print(
        f"baseline STRtree.query_nearest alone:               {t_near:.2f} s "
        f"(ratio ours/baseline {t_count / t_near:.2f})"
    )
    with tempfile.TemporaryDirectory() as tmp:
        csv = Path(tmp) / "incidents.csv"
        pd.DataFrame(
            {"x": x, "y": y, "date": pd.Series(dates).dt.strftime("%Y-%m-%d"), "kind": types}
        ).to_csv(csv, index=False)
        t_csv, from_csv = best(
            lambda: count_incidents(units, csv, x="x", y="y", crs="EPSG:32727", **kw), k=1
        )
        t_read, _ = best(lambda: pd.read_csv(csv, dtype=str), k=1)
    assert from_csv.counts.equals(table.counts)
    print(
        f"same from a 1M-row CSV (x/y, ISO text dates):     {t_csv:.2f} s "
        f"(of which pandas.read_csv alone {t_read:.2f} s)"
    )


if __name__ == "__main__":
    main()
