"""1M incidents onto 100k street segments (synthetic_grid); ratios against baselines in the same run."""

import time

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

from geoexp.outcomes import count_incidents
from geoexp.sampleregion import synthetic_grid
from geoexp.units import UnitSet

grid = synthetic_grid(100_000, jitter=5.0, seed=1)
units = UnitSet.from_frame(grid, "unit_id")
rng = np.random.default_rng(0)
n = 1_000_000
xmin, ymin, xmax, ymax = grid.total_bounds
x = rng.uniform(xmin, xmax, n)
y = rng.uniform(ymin, ymax, n)
dates = np.datetime64("2024-01-01") + rng.integers(0, 731, n)
types = np.array(["burglary", "robbery", "vandalism", "assault"], dtype=object)[
    rng.integers(0, 4, n)
]
inc = gpd.GeoDataFrame(
    {"date": dates.astype("datetime64[ns]"), "kind": types},
    geometry=shapely.points(x, y),
    crs=grid.crs,
)
kw = dict(
    date_column="date",
    tolerance_m=30.0,
    pre=("2024-01-01", "2024-12-31"),
    post=("2025-01-01", "2025-12-31"),
)


def best(f, k=2):
    ts = []
    for _ in range(k):
        t = time.perf_counter()
        out = f()
        ts.append(time.perf_counter() - t)
    return min(ts), out


t_count, tab = best(lambda: count_incidents(units, inc, **kw))
t_type, _ = best(lambda: count_incidents(units, inc, type_column="kind", by_type=True, **kw))
geoms = np.asarray(grid.geometry.array, dtype=object)
pts = shapely.points(x, y)
t_tree, _ = best(lambda: shapely.STRtree(geoms).query(pts[:0]))


def nearest():
    return shapely.STRtree(geoms).query_nearest(
        pts, max_distance=30.0, return_distance=True, all_matches=True
    )


t_near, _ = best(nearest, k=1)
print(tab.drops)
print(f"count_incidents, 1M incidents onto 100k segments: {t_count:.2f} s")
print(f"  with by_type (4 types):                         {t_type:.2f} s")
print(
    f"baseline STRtree.query_nearest(max_distance) alone: {t_near:.2f} s  (ratio count/baseline {t_count / t_near:.2f})"
)
csv = "/tmp/bench_incidents.csv"
pd.DataFrame(
    {"x": x, "y": y, "date": pd.Series(dates).dt.strftime("%Y-%m-%d"), "kind": types}
).to_csv(csv, index=False)
t_csv, tab2 = best(lambda: count_incidents(units, csv, x="x", y="y", crs="EPSG:32727", **kw), k=1)
t_read, _ = best(lambda: pd.read_csv(csv, dtype=str), k=1)
assert tab2.counts.equals(tab.counts)
print(
    f"same from a 1M-row CSV (x/y, ISO text dates):     {t_csv:.2f} s  (of which pandas.read_csv alone {t_read:.2f} s)"
)
