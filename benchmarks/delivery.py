"""Benchmark: GPS pings to minutes present per unit per week, 100k street segments.

The measured job reads a Parquet file of pings in chunks, snaps every ping to
the nearest segment within 25 m, groups each device's pings into stays and
sums minutes per unit per ISO week (``stays_from_pings(...).dosage("week")``).
It runs in a child process, which reports its own peak memory (``VmHWM``; the
pings are invented by ``simulate_pings`` in the parent and written to a
temporary file first, so their generation is neither timed nor counted). Wall
and CPU time are both printed, with the machine's load average and how often
the job was preempted, because on a shared machine the wall time measures the
other jobs as much as this one.

Baseline, in the same run: shapely's ``STRtree.query_nearest(max_distance=25)``
on the same pings, the usual one-call nearest-unit query per ping, which only
snaps (no reading, no stays, no sums). Run::

    python benchmarks/delivery.py                 # 1M pings
    python benchmarks/delivery.py --pings 10000000
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import shapely

from geoexp.sampleregion import simulate_pings, synthetic_grid

N_SEGMENTS = 100_000
TOLERANCE_M = 25.0
BASELINE_PINGS = 1_000_000  # the baseline is timed on at most this many pings, then scaled

JOB = """
import json, os, resource, sys, time
t = time.perf_counter()
import pyarrow.parquet as pq
from geoexp.delivery import stays_from_pings
from geoexp.sampleregion import synthetic_grid
from geoexp.units import UnitSet
units = UnitSet.from_frame(synthetic_grid({n}, jitter=5.0, seed=1), "unit_id")
t_units = time.perf_counter() - t
# Reading and decoding alone (the same columns and chunks), to tell I/O from computing.
t, cpu = time.perf_counter(), time.process_time()
for batch in pq.ParquetFile({path!r}).iter_batches(batch_size=1_000_000):
    pass
t_read, cpu_read = time.perf_counter() - t, time.process_time() - cpu
before = resource.getrusage(resource.RUSAGE_SELF)
t, cpu = time.perf_counter(), time.process_time()
stays = stays_from_pings({path!r}, units, x="x", y="y", crs="EPSG:32727", tolerance_m={tol})
weekly = stays.dosage("week")
t_job, cpu_job = time.perf_counter() - t, time.process_time() - cpu
after = resource.getrusage(resource.RUSAGE_SELF)
# VmHWM: this process's own peak resident memory. ru_maxrss is not used: across fork and
# exec the child inherits the parent's high-water mark (the parent holds the simulated pings).
with open("/proc/self/status") as f:
    hwm = next(int(line.split()[1]) for line in f if line.startswith("VmHWM:")) / 1024
print(json.dumps({{"seconds": t_job, "cpu": cpu_job, "units_seconds": t_units,
    "read_seconds": t_read, "read_cpu": cpu_read, "peak_mb": hwm,
    "preempted": after.ru_nivcsw - before.ru_nivcsw, "waits": after.ru_nvcsw - before.ru_nvcsw,
    "stays": len(stays), "unit_weeks": len(weekly.frame),
    "minutes": float(weekly.frame["minutes"].sum()), "summary": stays.summary}}))
"""


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--pings", type=int, default=1_000_000)
    args = parser.parse_args()
    grid = synthetic_grid(N_SEGMENTS, jitter=5.0, seed=1)
    t = time.perf_counter()
    pings = simulate_pings(grid.geometry.to_numpy(), args.pings, n_devices=300, rng=7)
    t_sim = time.perf_counter() - t
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "pings.parquet"
        pings.drop(columns="stop").to_parquet(path, row_group_size=1_000_000)
        size_mb = path.stat().st_size / 1e6
        x, y = pings["x"].to_numpy(), pings["y"].to_numpy()
        del pings
        code = JOB.format(n=N_SEGMENTS, path=str(path), tol=TOLERANCE_M)
        env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[1])}
        load_before = os.getloadavg()
        run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env)
        load_after = os.getloadavg()
        if run.returncode:
            sys.exit(run.stderr)
        job = json.loads(run.stdout.strip().splitlines()[-1])

    m = min(len(x), BASELINE_PINGS)
    tree = shapely.STRtree(np.asarray(grid.geometry.array, dtype=object))
    points = shapely.points(x[:m], y[:m])
    t, cpu = time.perf_counter(), time.process_time()
    tree.query_nearest(points, max_distance=TOLERANCE_M, return_distance=True)
    t_base = (time.perf_counter() - t) * len(x) / m
    cpu_base = (time.process_time() - cpu) * len(x) / m

    n = len(x)
    print(f"{n:,} pings of 300 devices (simulated in {t_sim:.1f} s; Parquet {size_mb:.0f} MB)")
    print(f"onto {N_SEGMENTS:,} segments, tolerance {TOLERANCE_M:g} m")
    for key, value in job["summary"].items():
        print(f"  {key.replace('_', ' ')}: {value}")
    print(
        f"  {job['stays']:,} stays, {job['unit_weeks']:,} unit-weeks with presence, "
        f"{job['minutes']:,.0f} minutes present"
    )
    print(
        f"geoexp, pings to minutes per unit per week: {job['seconds']:.1f} s wall, "
        f"{job['cpu']:.1f} s CPU ({job['cpu'] / n * 1e7:.0f} s CPU per 10M pings), "
        f"peak memory {job['peak_mb']:,.0f} MB (units read in {job['units_seconds']:.1f} s, "
        "not counted)"
    )
    print(
        f"  reading and decoding the Parquet file alone (a separate pass, not in the job): {job['read_seconds']:.1f} s "
        f"wall, {job['read_cpu']:.1f} s CPU; during the job the process was preempted "
        f"{job['preempted']:,} times and waited of its own accord {job['waits']:,} times "
        "(locks, I/O)"
    )
    print(
        "  load average (1 min) before and after the job: "
        f"{load_before[0]:.2f}, {load_after[0]:.2f} on {os.cpu_count()} cores"
    )
    scaled = "" if m == n else f" (timed on {m:,} pings, scaled)"
    print(
        f"baseline STRtree.query_nearest per ping, snapping only: {t_base:.1f} s wall, "
        f"{cpu_base:.1f} s CPU{scaled}; ratio geoexp / baseline {job['seconds'] / t_base:.2f} "
        f"wall, {job['cpu'] / cpu_base:.2f} CPU"
    )


if __name__ == "__main__":
    main()
