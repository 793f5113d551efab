"""Invented places to try geoexp on.

:func:`load_sample_region` returns the fictional city of Quillmere that ships
with geoexp (street segments, parcels, districts and two years of invented
incidents); :func:`make_city` regenerates it, or a variant, from a seed.
:func:`synthetic_grid` makes plain street grids or parcel grids of any size for
benchmarks and tests. Every name in these layers is invented.
"""

from geoexp.sampleregion._city import (
    SampleRegion,
    load_sample_region,
    make_city,
    write_sample_region,
)
from geoexp.sampleregion._grid import synthetic_grid
from geoexp.sampleregion._patrols import simulate_pings
from geoexp.sampleregion._trial import DEMO_MULTIPLIERS, simulate_trial_incidents

__all__ = [
    "DEMO_MULTIPLIERS",
    "simulate_trial_incidents",
    "SampleRegion",
    "load_sample_region",
    "make_city",
    "simulate_pings",
    "synthetic_grid",
    "write_sample_region",
]
