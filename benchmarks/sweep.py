"""A design sweep in this process, against a per-trial loop and a local Dask cluster of 1 and 2 workers.

Run: python benchmarks/sweep.py [--segments 20000] [--candidates 8] [--sims 200] [--draws 200]
                                [--cluster-candidates N] [--no-cluster]

The large run of the sweep targets:

    python benchmarks/sweep.py --segments 100000 --candidates 24 --sims 500 --draws 500

A generated city of ``--segments`` street segments (``synthetic_grid`` with
10 m jitter, an invented baseline count: a smooth hot-spot surface times
gamma noise); the top 10% by baseline are eligible. The grid is treated in
the first ``--candidates / 4`` of {6%, 8%, 10%, 12%, 14%, 16%} of the
eligible units x gap {0, 150 m} x bands {150/300 m, 100/200 m}, each with
``--sims`` simulated trials x ``--draws`` randomization draws and 1,000 draws
for its exposure probabilities. Prints, each measured in this run:

- ``this process``: :func:`geoexp.sweep.run_sweep` (numba kernels and the
  large matrix products on this process's cores), with the seconds of each
  candidate;
- the baseline: the same coverage computed by a per-trial loop, the
  analysis's own test inversion (:func:`geoexp.inference.constant_effect_test`,
  one pass of the exposure engine per trial) run on 3 simulated trials of the
  first candidate's treated row and scaled to every trial of every
  candidate's two coverage rows;
- ``1 worker`` and ``2 workers``: the sweep of the first
  ``--cluster-candidates`` candidates (a multiple of 4; default: all) on a local Dask cluster of that many worker
  processes, one thread each; the start of the cluster and the first task of
  each worker (imports, loading the compiled kernels) are timed apart from
  the sweep, which then runs on warm workers; the CPU seconds each worker
  process used during the sweep; whether the rows are identical to this
  process's (they must be);
- the load average of the machine (/proc/loadavg) before and after each part.

The machine is shared: read the ratios and the CPU seconds beside the load, not
the wall seconds alone.
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

from geoexp.design import Design, DesignSpec
from geoexp.sampleregion import synthetic_grid
from geoexp.sweep import DaskBackend, SweepLayer, SweepSpec, run_sweep

SHARES = (0.06, 0.08, 0.10, 0.12, 0.14, 0.16)


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
            "eligible": {"top_column": "baseline", "top_share": 0.1},
            "assignment": {"method": "complete", "treated": max(2, n_units // 100)},
            "exposure": {"bands_m": [150.0, 300.0]},
        },
        base_dir=str(out),
    )


def _spec(base: DesignSpec, n_units: int, n_candidates: int, sims: int, draws: int) -> SweepSpec:
    """The sweep of the first ``n_candidates // 4`` treated shares x 2 gaps x 2 band sets."""
    if n_candidates % 4 or not 4 <= n_candidates <= 4 * len(SHARES):
        raise SystemExit(f"--candidates must be a multiple of 4 from 4 to {4 * len(SHARES)}")
    eligible = n_units // 10
    treated = [max(1, round(s * eligible)) for s in SHARES[: n_candidates // 4]]
    return SweepSpec.from_dict(
        {
            "name": "benchmark sweep",
            "grid": {"treated": treated, "gap_m": [0, 150], "bands_m": [[150, 300], [100, 200]]},
            "effects": {"treated": 0.8, "spillover_1": 0.95},
            "simulation": {"sims": sims, "draws": draws, "baseline_column": "baseline"},
        },
        base=base,
    )


def _load() -> str:
    return " ".join(Path("/proc/loadavg").read_text().split()[:3])


def _per_trial_loop(spec: SweepSpec, layer: SweepLayer, n_trials: int = 3) -> float:
    """Seconds of the analysis's own test inversion for one simulated trial (mean of a few)."""
    from geoexp._rng import Stream
    from geoexp.exposure import assign_conditions
    from geoexp.inference import ContrastSpec, constant_effect_test
    from geoexp.power import NegativeBinomialOutcome

    design = Design.from_spec(
        spec.design_spec(spec.candidates()[0]),
        units=layer.units,
        graph=layer.graph,
        eligible=layer.eligible,
    )
    probs = design.probabilities().probabilities
    model = NegativeBinomialOutcome("baseline", 0.5, {"treated": 0.8})
    means = model.unit_means(design)
    effects = model.effects(design.mapping)
    draws = design.sampler.draw_many(n_trials, design.stream(Stream.POWER))
    pc = design.mapping.pure_control
    mask = design.eligible & (probs[:, 0] >= 0.05) & (probs[:, pc] >= 0.05)
    gen = np.random.default_rng(1)
    start = time.perf_counter()
    for s in range(n_trials):
        d = assign_conditions(design.graph, design.mapping, draws.treated(s))
        y = model.sample(model.expected(means, effects, d), gen) - model.sample(means, gen)
        constant_effect_test(
            design,
            d,
            y,
            probs,
            ContrastSpec(0, pc, mask),
            np.zeros(design.mapping.n_conditions),
            n_draws=spec.simulation.draws,
        )
    return (time.perf_counter() - start) / n_trials


def _worker_cpu() -> float:
    return time.process_time()


def main() -> None:
    logging.getLogger("distributed").setLevel(logging.ERROR)
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--segments", type=int, default=20_000)
    parser.add_argument("--candidates", type=int, default=8)
    parser.add_argument("--sims", type=int, default=200)
    parser.add_argument("--draws", type=int, default=200)
    parser.add_argument("--cluster-candidates", type=int, default=None)
    parser.add_argument("--no-cluster", action="store_true")
    args = parser.parse_args()

    with tempfile.TemporaryDirectory() as folder:
        base = make_city(Path(folder), args.segments)
        spec = _spec(base, args.segments, args.candidates, args.sims, args.draws)
        start = time.perf_counter()
        layer = SweepLayer.for_specs(base, [spec.design_spec(c) for c in spec.candidates()])
        print(
            f"{args.segments:,} segments ({int(layer.eligible.sum()):,} eligible), "
            f"{args.candidates} candidates x {args.sims} simulated trials x {args.draws} draws; "
            f"{os.cpu_count()} cores; shared layer and graph "
            f"{time.perf_counter() - start:.1f} s ({layer.graph.indices.size:,} pairs); "
            f"load average {_load()}"
        )
        warm = _spec(base, args.segments, 4, 2, 2)
        run_sweep(warm, layer=layer)  # compile the kernels first
        load = _load()
        cpu, start = time.process_time(), time.perf_counter()
        local = run_sweep(spec, layer=layer).table.sort_index()
        seconds = {"local": time.perf_counter() - start}
        cpu_local = time.process_time() - cpu
        per = local["seconds"]
        print(
            f"this process:              {seconds['local']:7.1f} s wall, {cpu_local:.1f} s CPU "
            f"({per.min():.1f} to {per.max():.1f} s per candidate); load average before "
            f"{load}, after {_load()}"
        )
        trial = _per_trial_loop(spec, layer)
        loop = trial * args.sims * 2 * args.candidates
        print(
            f"baseline, per-trial loop:  {trial:7.2f} s per simulated trial and row (3 trials "
            f"timed) -> about {loop:,.0f} s for the coverage of {args.candidates} candidates x 2 rows "
            f"x {args.sims} trials; this process is {loop / seconds['local']:.0f}x faster and "
            "also computes power, bias and units"
        )
        pd.set_option("display.width", 200)
        shown = ["treated", "gap_m", "bands_m", "power_treated", "coverage_treated"]
        shown += ["coverage_mc_error_treated", "coverage_spillover_1", "seconds"]
        print(local[[c for c in shown if c in local.columns]].to_string())
        if args.no_cluster:
            return
        n_cluster = args.cluster_candidates or args.candidates
        subset = _spec(base, args.segments, n_cluster, args.sims, args.draws)
        mine = local
        if n_cluster < args.candidates:
            mine = run_sweep(subset, layer=layer).table.sort_index()
        tables, cpus = {}, {}
        for n in (1, 2):
            start = time.perf_counter()
            backend = DaskBackend(workers=n)
            run_sweep(warm, layer=layer, backend=backend)
            startup = time.perf_counter() - start
            try:
                before = backend.client.run(_worker_cpu)
                load = _load()
                start = time.perf_counter()
                tables[n] = run_sweep(subset, layer=layer, backend=backend).table.sort_index()
                seconds[n] = time.perf_counter() - start
                after = backend.client.run(_worker_cpu)
                cpus[n] = [after[w] - before[w] for w in sorted(after)]
            finally:
                backend.close()
            print(
                f"{n} worker{'s' if n > 1 else ' '} ({n_cluster} candidates, warm): "
                f"{seconds[n]:7.1f} s wall; CPU per worker "
                f"{', '.join(f'{c:.1f}' for c in cpus[n])} s; cluster start and first tasks "
                f"{startup:.1f} s; load average before {load}, after {_load()}"
            )
        rows = mine.drop(columns=["seconds", "rank"])
        same = all(tables[n].drop(columns=["seconds", "rank"]).equals(rows) for n in (1, 2))
        print(
            f"speed-up of 2 workers over 1: {seconds[1] / seconds[2]:.2f}x (wall); "
            f"busiest worker's CPU {max(cpus[2]):.1f} s against {max(cpus[1]):.1f} s; "
            f"rows identical to this process: {same}"
        )


if __name__ == "__main__":
    main()
