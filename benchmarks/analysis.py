"""The whole analysis of a trial: seconds and peak memory per stage.

Run: python benchmarks/analysis.py [--case region|city|both] [--n 100000] [--draws 2000]

Two cases, each run in its own subprocess so that its peak resident memory
(``ru_maxrss``) is its own:

``region``
    The invented sample city with the demo design (40 of the top 150 hot-spot
    segments, kept 150 m apart, bands 150/300 m): draw, write the trial file,
    simulate the trial year with a planted effect, count the incidents, analyse.
``city``
    A generated city of ``--n`` street segments (``synthetic_grid`` with
    10 m jitter) written to a GeoPackage with an invented baseline count;
    complete randomization of 2,000 among the top half by baseline (the other
    half are the focal units of the conditional spillover test), bands
    150/300 m; Poisson outcomes with a planted effect (treated x0.8, first
    band x1.1), counts taken with ``OutcomeTable.from_counts``.

The analysis (estimates, Fisher tests, conditional spillover tests and
test-inversion intervals, ``--draws`` draws each) is split into its parts by
timing the functions :func:`geoexp.analysis.analyse` calls. Memory is the peak
RSS of the subprocess up to the end of each stage (it never decreases); for
the parts of the analysis, up to the end of the part's first call. ``--results``
keeps every column of the result table at full precision, to check that a
change left the results alone. The machine is shared, so repeat a run before
reading much into one number.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

import numpy as np
import pandas as pd

N_TREATED = 2_000
_RESULTS_PATH: str | None = None
EFFECTS = {"treated": 0.8, "spillover_1": 1.1}


def _peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


class Stages:
    """Seconds and peak RSS after each named stage; printed as JSON lines for the parent."""

    def __init__(self) -> None:
        self.start = time.perf_counter()

    def done(self, name: str, seconds: float | None = None, peak_mb: float | None = None) -> None:
        now = time.perf_counter()
        took = now - self.start if seconds is None else seconds
        peak = _peak_mb() if peak_mb is None else peak_mb
        print(json.dumps({"stage": name, "seconds": took, "peak_mb": peak}), flush=True)
        self.start = now


def _instrument_analysis() -> tuple[dict[str, float], dict[str, float]]:
    """Wrap the parts ``analyse`` calls so their seconds add up per part.

    Also returns the peak RSS at the end of each part's first call: the parts
    first run in the order listed, so a jump there belongs to that part.
    """
    import geoexp.analysis._run as run

    spent: dict[str, float] = defaultdict(float)
    peak: dict[str, float] = {}
    parts = {
        "condition_bits": "joint-probability bits (condition_bits)",
        "_near_pairs": "linked pairs (dependence_pairs)",
        "estimate_contrast": "estimates + Aronow-Samii variances",
        "fisher_test": "Fisher tests",
        "spillover_test": "conditional spillover tests",
        "constant_effect_tests": "additive tests + inverted intervals",
        "rate_ratio_tests": "rate-ratio tests + inverted intervals",
        "_wdq_intervals": "displacement quotient intervals",
    }
    for attr, label in parts.items():
        original = getattr(run, attr)

        def wrapper(*args, _f=original, _label=label, **kwargs):
            t0 = time.perf_counter()
            try:
                return _f(*args, **kwargs)
            finally:
                spent[_label] += time.perf_counter() - t0
                peak.setdefault(_label, _peak_mb())

        setattr(run, attr, wrapper)
    return spent, peak


def _analyse(trial_path: Path, outcomes, n_draws: int, stages: Stages) -> None:
    from geoexp.analysis import analyse

    spent, peak = _instrument_analysis()
    t0 = time.perf_counter()
    result = analyse(trial_path, outcomes, n_draws=n_draws)
    total = time.perf_counter() - t0
    for label, seconds in spent.items():
        stages.done(f"  {label}", seconds, peak[label])
    stages.done("analysis (total)", total)
    frame = result.to_frame()
    if _RESULTS_PATH is not None:
        # every column at full precision, to compare runs before and after a change
        frame.to_pickle(_RESULTS_PATH)
    frame = frame[["estimate", "std_error", "p_value", "p_value_no_spillover"]]
    print(json.dumps({"result": frame.reset_index().to_dict(orient="records")}), flush=True)


def region_case(out: Path, n_draws: int) -> None:
    from geoexp.design import Design
    from geoexp.outcomes import count_incidents
    from geoexp.quickstart import demo_spec
    from geoexp.sampleregion import (
        load_sample_region,
        simulate_trial_incidents,
        write_sample_region,
    )
    from geoexp.trialfile import TrialFile, write_trial

    stages = Stages()
    region = load_sample_region()
    region_path = out / "region.gpkg"
    write_sample_region(region, region_path)
    spec = demo_spec(region_path, out).replace(draws=n_draws)
    stages.done(f"load sample region ({len(region.segments):,} segments)")
    design = Design.from_spec(spec)
    assignment = design.draw()
    stages.done("design: units, graph, sampler, draw")
    trial_path = out / "trial.gpkg"
    write_trial(trial_path, design, assignment)
    stages.done("write trial file")
    simulated = simulate_trial_incidents(region, assignment.to_frame()["condition"])
    incidents = pd.concat([region.incidents, simulated], ignore_index=True)
    outcomes = count_incidents(
        TrialFile.open(trial_path),
        incidents,
        date_column="date",
        type_column="incident_type",
        tolerance_m=30.0,
        pre=("2025-01-01", "2025-12-31"),
        post=("2026-01-01", "2026-12-31"),
    )
    stages.done("simulate and count incidents")
    _analyse(trial_path, outcomes, n_draws, stages)


def city_case(out: Path, n_units: int, n_draws: int) -> None:
    import pyogrio

    from geoexp.design import Design, DesignSpec
    from geoexp.outcomes import OutcomeTable
    from geoexp.sampleregion._grid import synthetic_grid
    from geoexp.trialfile import TrialFile, write_trial

    stages = Stages()
    rng = np.random.default_rng(7)
    grid = synthetic_grid(n_units, jitter=10.0, seed=7)
    # invented baseline: a smooth hot-spot surface times gamma noise
    xy = np.column_stack([grid.geometry.centroid.x, grid.geometry.centroid.y])
    centre = xy.mean(axis=0)
    scale = np.ptp(xy[:, 0]) / 4
    rate = 0.5 + 4.0 * np.exp(-((xy - centre) ** 2).sum(axis=1) / (2 * scale**2))
    rate = rate * rng.gamma(2.0, 0.5, size=rate.size)
    grid["baseline"] = rng.poisson(rate)
    units_path = out / "city.gpkg"
    pyogrio.write_dataframe(grid, units_path, layer="segments")
    stages.done(f"generate city ({n_units:,} segments) and write GeoPackage")
    spec = DesignSpec.from_dict(
        {
            "name": "benchmark city",
            "seed": 11,
            "draws": n_draws,
            "units": {"path": str(units_path), "layer": "segments", "id_column": "unit_id"},
            "eligible": {"top_column": "baseline", "top_share": 0.5},
            "assignment": {"method": "complete", "treated": N_TREATED},
            "exposure": {"bands_m": [150.0, 300.0], "metric": "euclidean"},
        },
        base_dir=str(out),
        source="benchmark spec",
    )
    design = Design.from_spec(spec)
    assignment = design.draw()
    stages.done("design: units, graph, sampler, draw")
    trial_path = out / "trial.gpkg"
    write_trial(trial_path, design, assignment)
    stages.done("write trial file")
    conditions = assignment.to_frame()["condition"].to_numpy()
    multiplier = pd.Series(conditions).map(EFFECTS).fillna(1.0).to_numpy()
    frame = pd.DataFrame(
        {
            "unit_id": design.units.ids,
            "pre": rng.poisson(rate),
            "post": rng.poisson(rate * multiplier),
        }
    )
    outcomes = OutcomeTable.from_counts(
        frame,
        "unit_id",
        units=TrialFile.open(trial_path),
        pre=("2025-01-01", "2025-12-31"),
        post=("2026-01-01", "2026-12-31"),
    )
    stages.done("simulate Poisson outcomes, OutcomeTable.from_counts")
    _analyse(trial_path, outcomes, n_draws, stages)


def child(case: str, n_units: int, n_draws: int) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        if case == "region":
            region_case(Path(tmp), n_draws)
        else:
            city_case(Path(tmp), n_units, n_draws)


def parent(case: str, n_units: int, n_draws: int, results: str | None = None) -> None:
    title = "sample region" if case == "region" else f"generated city, {n_units:,} segments"
    print(f"\n== {title}: {n_draws:,} draws per test ==")
    print(f"{'stage':<58}{'seconds':>9}{'peak RSS MB':>13}")
    cmd = [sys.executable, __file__, "--child", case, "--n", str(n_units), "--draws", str(n_draws)]
    if results is not None:
        cmd += ["--results", f"{results}.{case}.pkl"]
    start = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, text=True)
    for line in proc.stdout:
        try:
            row = json.loads(line)
        except json.JSONDecodeError:
            continue
        if "stage" in row:
            print(f"{row['stage']:<58}{row['seconds']:>9.1f}{row['peak_mb']:>13,.0f}")
        elif "result" in row:
            for r in row["result"]:
                print(
                    f"    {r['contrast']:<36} {r['estimate']:+.3f} (SE {r['std_error']:.3f}) "
                    f"p={r['p_value']:.3f} p(no spillover)={r['p_value_no_spillover']:.3f}"
                )
    if proc.wait():
        raise SystemExit(f"the {case} case failed")
    print(f"{'wall clock (subprocess, imports included)':<58}{time.perf_counter() - start:>9.1f}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--case", choices=["region", "city", "both"], default="both")
    parser.add_argument("--n", type=int, default=100_000, help="segments of the generated city")
    parser.add_argument("--draws", type=int, default=2_000, help="draws per test")
    parser.add_argument(
        "--results",
        help="write each case's full result table (pickle) to RESULTS.<case>.pkl",
    )
    parser.add_argument("--child", choices=["region", "city"], help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        global _RESULTS_PATH
        _RESULTS_PATH = args.results
        child(args.child, args.n, args.draws)
        return
    for case in ("region", "city") if args.case == "both" else (args.case,):
        parent(case, args.n, args.draws, args.results)


if __name__ == "__main__":
    main()
