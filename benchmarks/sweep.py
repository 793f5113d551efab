"""A design sweep in this process against a local Dask cluster of 1 and 2 worker processes.

Run: python benchmarks/sweep.py [--n 20000] [--sims 200] [--draws 200]

A generated city of ``--n`` street segments (``synthetic_grid`` with 10 m
jitter, an invented baseline count: a smooth hot-spot surface times gamma
noise); the top half by baseline are eligible; the grid is treated in
{200, 400, 800} x gap in {0, 150 m}, bands 150/300 m: six candidates, each
with ``--sims`` simulated trials x ``--draws`` randomization draws and 1,000
draws for its exposure probabilities. Prints, each measured in this run:

- ``local``: :func:`geoexp.sweep.run_sweep` in this process (numba kernels
  on this process's cores, BLAS on one thread);
- ``1 worker`` and ``2 workers``: the same sweep on a local Dask cluster of
  that many worker processes, one thread each; the start of the cluster and
  the first task of each worker (imports, loading the compiled kernels) are
  timed apart from the sweep, which then runs on warm workers;
- the speed-up of 2 workers over 1 and over this process, and whether the
  tables are identical (they must be).

The machine is shared: read the ratios, not the seconds.
"""

from __future__ import annotations

import argparse
import logging
import os
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from geoexp.design import DesignSpec
from geoexp.sampleregion import synthetic_grid
from geoexp.sweep import DaskBackend, SweepLayer, SweepSpec, run_sweep


def make_city(out: Path, n_units: int) -> DesignSpec:
    import pyogrio

    rng = np.random.default_rng(7)
    grid = synthetic_grid(n_units, jitter=10.0, seed=7)
    xy = np.column_stack([grid.geometry.centroid.x, grid.geometry.centroid.y])
    centre = xy.mean(axis=0)
    scale = np.ptp(xy[:, 0]) / 4
    rate = 0.5 + 4.0 * np.exp(-((xy - centre) ** 2).sum(axis=1) / (2 * scale**2))
    grid["baseline"] = rng.poisson(rate * rng.gamma(2.0, 0.5, size=rate.size))
    path = out / "city.gpkg"
    pyogrio.write_dataframe(grid, path, layer="segments")
    return DesignSpec.from_dict(
        {
            "name": "benchmark city",
            "seed": 11,
            "draws": 1000,
            "units": {"path": str(path), "layer": "segments", "id_column": "unit_id"},
            "eligible": {"top_column": "baseline", "top_share": 0.5},
            "assignment": {"method": "complete", "treated": 200},
            "exposure": {"bands_m": [150.0, 300.0]},
        },
        base_dir=str(out),
    )


def main() -> None:
    logging.getLogger("distributed").setLevel(logging.ERROR)
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=20_000)
    parser.add_argument("--sims", type=int, default=200)
    parser.add_argument("--draws", type=int, default=200)
    args = parser.parse_args()

    with tempfile.TemporaryDirectory() as folder:
        base = make_city(Path(folder), args.n)
        data = {
            "name": "benchmark sweep",
            "grid": {"treated": [200, 400, 800], "gap_m": [0, 150]},
            "effects": {"treated": 0.8, "spillover_1": 0.95},
            "simulation": {"sims": args.sims, "draws": args.draws, "baseline_column": "baseline"},
        }
        spec = SweepSpec.from_dict(data, base=base)
        warm = SweepSpec.from_dict(
            {
                **data,
                "grid": {"treated": [200, 400]},
                "simulation": {"sims": 2, "draws": 2, "baseline_column": "baseline"},
            },
            base=base,
        )
        start = time.perf_counter()
        layer = SweepLayer.for_specs(base, [spec.design_spec(c) for c in spec.candidates()])
        print(
            f"{args.n:,} segments, {len(spec.candidates())} candidates x {args.sims} simulated "
            f"trials x {args.draws} draws; {os.cpu_count()} cores, load average "
            f"{os.getloadavg()[0]:.1f}; shared layer and graph "
            f"{time.perf_counter() - start:.1f} s"
        )
        run_sweep(warm, layer=layer)  # compile the kernels first
        start = time.perf_counter()
        local = run_sweep(spec, layer=layer)
        seconds = {"local": time.perf_counter() - start}
        print(f"local (this process):        {seconds['local']:6.1f} s")
        tables = {}
        for n in (1, 2):
            start = time.perf_counter()
            backend = DaskBackend(workers=n)
            run_sweep(warm, layer=layer, backend=backend)
            startup = time.perf_counter() - start
            try:
                start = time.perf_counter()
                tables[n] = run_sweep(spec, layer=layer, backend=backend).table
                seconds[n] = time.perf_counter() - start
            finally:
                backend.close()
            print(
                f"{n} worker{'s' if n > 1 else ' '} (warm):            {seconds[n]:6.1f} s "
                f"(cluster start and first tasks {startup:.1f} s)"
            )
        same = all(
            tables[n].drop(columns="seconds").equals(local.table.drop(columns="seconds"))
            for n in (1, 2)
        )
        print(
            f"speed-up of 2 workers: {seconds[1] / seconds[2]:.2f}x over 1 worker, "
            f"{seconds['local'] / seconds[2]:.2f}x over this process; tables identical: {same}"
        )
        print(f"load average at the end: {os.getloadavg()[0]:.1f}")
        per = local.table["seconds"]
        print(f"seconds per candidate in this process: {per.min():.1f} to {per.max():.1f}")
        pd.set_option("display.width", 200)
        print(local.table[["rank", "power_treated", "mde_treated", "expected_treated"]])


if __name__ == "__main__":
    main()
