"""The whole analysis of a trial: seconds and peak memory per stage.

Run: python benchmarks/analysis.py [--case region|city|both|job] [--n 100000] [--draws 2000]
     python benchmarks/analysis.py --case job [--segments 1000000] [--treated 5000]

Three cases, each run in its own subprocess so that its peak resident memory
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
``job``
    The whole job on a generated city of ``--segments`` street segments
    (default 1,000,000), ``--treated`` of them treated (default 5,000) among
    the top segments by baseline, ten for each treated one (same spec
    otherwise as ``city``): graph and design, draw, exposure
    probabilities (written with the trial file), invented incident points on
    the segments (Poisson, pre-period and post-period, the planted effect)
    counted by ``count_incidents``, the analysis, and the report (HTML and
    Markdown, with its static map).

Every stage prints its wall-clock seconds, the CPU seconds of the process in
it (all threads), the peak RSS so far and the load average at its end: the
machine is shared, so read wall clock beside CPU time and load. After the
analysis, the exposure sums of one test (``--draws`` draws, twelve weight
columns) are timed twice on the same draws: the engine's kernel (64 draws at
a time) against the earlier kernel (one draw at a time), the baseline measured
in the same run.

The analysis (estimates, Fisher tests, conditional spillover tests and
test-inversion intervals, ``--draws`` draws each) is split into its parts by
timing the functions :func:`geoexp.analysis.analyse` calls. In the ``city``
case the tests' shared pass over the draws is timed again beside the earlier
way, one pass per test, on the same columns and draws. Memory is the peak
RSS of the subprocess up to the end of each stage (it never decreases); for
the parts of the analysis, up to the end of the part's first call. ``--results``
keeps every column of the result table at full precision, to check that a
change left the results alone. The machine is shared, so repeat a run before
reading much into one number.
"""

from __future__ import annotations

import argparse
import gc
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
# the columns of every test the analysis queued on its shared draws (filled by _analyse)
QUEUED: list[np.ndarray] = []
_RESULTS_PATH: str | None = None
EFFECTS = {"treated": 0.8, "spillover_1": 1.1}


def _peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _cpu_s() -> float:
    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime


def _load() -> float:
    """The one-minute load average of the machine."""
    with open("/proc/loadavg") as f:
        return float(f.read().split()[0])


class Stages:
    """Seconds, CPU seconds and peak RSS after each named stage; JSON lines for the parent."""

    def __init__(self) -> None:
        self.start = time.perf_counter()
        self.cpu = _cpu_s()

    def done(
        self,
        name: str,
        seconds: float | None = None,
        peak_mb: float | None = None,
        cpu: float | None = None,
    ) -> None:
        now, cpu_now = time.perf_counter(), _cpu_s()
        took = now - self.start if seconds is None else seconds
        used = cpu_now - self.cpu if cpu is None else cpu
        peak = _peak_mb() if peak_mb is None else peak_mb
        row = {"stage": name, "seconds": took, "cpu": used, "peak_mb": peak, "load": _load()}
        print(json.dumps(row), flush=True)
        self.start, self.cpu = now, cpu_now


def _instrument_analysis() -> tuple[dict[str, float], dict[str, float], dict[str, float]]:
    """Wrap the parts ``analyse`` calls so their seconds add up per part.

    Also returns the peak RSS at the end of each part's first call: the parts
    first run in the order listed, so a jump there belongs to that part.
    """
    import geoexp.analysis._run as run

    spent: dict[str, float] = defaultdict(float)
    cpu: dict[str, float] = defaultdict(float)
    peak: dict[str, float] = {}
    parts = {
        "condition_bits": "joint-probability bits (condition_bits)",
        "_near_pairs": "linked pairs (dependence_pairs)",
        "estimate_contrasts": "estimates + Aronow-Samii variances",
        "spillover_test": "conditional spillover tests (eligible focal units)",
    }
    for attr, label in parts.items():
        original = getattr(run, attr)

        def wrapper(*args, _f=original, _label=label, **kwargs):
            t0, c0 = time.perf_counter(), _cpu_s()
            try:
                return _f(*args, **kwargs)
            finally:
                spent[_label] += time.perf_counter() - t0
                cpu[_label] += _cpu_s() - c0
                peak.setdefault(_label, _peak_mb())

        setattr(run, attr, wrapper)
    # additive and rate-ratio tests with their intervals, Fisher's test, the spillover tests on
    # units never treated and the displacement quotient's spread: one pass over the same draws
    shared_label = "shared draws: additive, rate-ratio, Fisher, spillover tests, intervals"
    original_run = run.SharedDraws.run

    def shared_run(self, _f=original_run):
        t0, c0 = time.perf_counter(), _cpu_s()
        try:
            return _f(self)
        finally:
            spent[shared_label] += time.perf_counter() - t0
            cpu[shared_label] += _cpu_s() - c0
            peak.setdefault(shared_label, _peak_mb())

    run.SharedDraws.run = shared_run  # type: ignore[method-assign]
    original_enqueue = run.SharedDraws._enqueue

    def enqueue(self, blocks, finish, _f=original_enqueue):
        # every queued test's columns, for the one-pass-per-test baseline
        QUEUED.append(np.hstack([np.asarray(b, dtype=float) for b in blocks]))
        return _f(self, blocks, finish)

    run.SharedDraws._enqueue = enqueue  # type: ignore[method-assign]
    return spent, cpu, peak


def _analyse(trial_path: Path, outcomes, n_draws: int, stages: Stages):
    from geoexp.analysis import analyse

    spent, cpu, peak = _instrument_analysis()
    t0, c0 = time.perf_counter(), _cpu_s()
    result = analyse(trial_path, outcomes, n_draws=n_draws)
    total, total_cpu = time.perf_counter() - t0, _cpu_s() - c0
    for label, seconds in spent.items():
        stages.done(f"  {label}", seconds, peak[label], cpu[label])
    stages.done("analysis (total)", total, cpu=total_cpu)
    frame = result.to_frame()
    if _RESULTS_PATH is not None:
        # every column at full precision, to compare runs before and after a change
        frame.to_pickle(_RESULTS_PATH)
    short = frame[["estimate", "std_error", "p_value", "p_value_no_spillover"]]
    print(json.dumps({"result": short.reset_index().to_dict(orient="records")}), flush=True)
    return result


def _shared_baseline(trial_path: Path, n_draws: int, stages: Stages) -> None:
    """The analysis's tests on shared draws against one pass per test, on the same draws.

    Before the tests shared their draws, each test (the additive and the
    rate-ratio tests of each condition, Fisher's test, each band's spillover
    test, the quotient's spread) made its own pass of the exposure engine.
    Both are timed here on the very columns the analysis queued.
    """
    from geoexp._rng import Stream
    from geoexp.inference._draws import draw_sums
    from geoexp.inference._shared import _distinct_columns
    from geoexp.trialfile import TrialFile, design_from_trial

    design, _ = design_from_trial(TrialFile.open(trial_path))
    seq = design.stream(Stream.ROW_TESTS)
    d = design
    stages.done("rebuild the design for the shared-draws comparison")
    columns = np.hstack(QUEUED)
    keep, _ = _distinct_columns(list(columns.T))
    shared = draw_sums(d.sampler, d.graph, d.mapping, columns[:, keep], n_draws, seq)
    stages.done(
        f"  {len(QUEUED)} tests, {columns.shape[1]} columns ({keep.size} distinct): one shared pass"
    )
    alone = [draw_sums(d.sampler, d.graph, d.mapping, c, n_draws, seq) for c in QUEUED]
    stages.done(f"  the same {len(QUEUED)} tests, one pass each (before)")
    same = np.array_equal(np.concatenate(alone, axis=2)[:, :, keep], shared)
    print(json.dumps({"note": f"  the two ways' sums are identical: {same}"}), flush=True)


def _kernel_baseline(trial_path: Path, n_draws: int, stages: Stages) -> None:
    """One test's exposure sums on the same draws: this engine's kernel, then the earlier one."""
    from geoexp._rng import as_seed_sequence
    from geoexp.exposure import BandedReach
    from geoexp.exposure._kernels import scatter_counts
    from geoexp.trialfile import TrialFile, design_from_trial

    design, _ = design_from_trial(TrialFile.open(trial_path))
    reach = BandedReach.of(design.graph, design.mapping)
    weights = np.random.default_rng(3).random((design.units.n, 12))
    chunks = list(design.sampler.iter_chunks(n_draws, as_seed_sequence(3)))
    stages.done("rebuild the design, draw once more for the kernel comparison")
    sums = {}
    for by_draw, name in ((False, "64 draws at a time"), (True, "one draw at a time (before)")):
        parts = [
            scatter_counts(
                c.indptr,
                c.indices,
                reach.indptr,
                reach.indices,
                reach.distances,
                reach.edges,
                design.units.n,
                weights,
                g_code=reach.codes,
                by_draw=by_draw,
            )[2]
            for c in chunks
        ]
        sums[by_draw] = np.concatenate(parts)
        stages.done(f"  one test's sums, {n_draws:,} draws: {name}")
    same = np.allclose(sums[False], sums[True], rtol=1e-12, atol=1e-9)
    print(json.dumps({"note": f"  the two kernels' sums agree to 1e-12: {same}"}), flush=True)


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


def _city(
    out: Path, n_units: int, n_treated: int, n_draws: int, stages: Stages, top_share: float = 0.5
):
    """A generated city written to a GeoPackage, its design drawn and its trial file written."""
    import pyogrio

    from geoexp.design import Design, DesignSpec
    from geoexp.sampleregion._grid import synthetic_grid
    from geoexp.trialfile import write_trial

    rng = np.random.default_rng(7)
    grid = synthetic_grid(n_units, jitter=10.0, seed=7)
    # invented baseline: a smooth hot-spot surface times gamma noise
    centroids = grid.geometry.centroid
    xy = np.column_stack([centroids.x, centroids.y])
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
            "eligible": {"top_column": "baseline", "top_share": top_share},
            "assignment": {"method": "complete", "treated": n_treated},
            "exposure": {"bands_m": [150.0, 300.0], "metric": "euclidean"},
        },
        base_dir=str(out),
        source="benchmark spec",
    )
    design = Design.from_spec(spec)
    stages.done("design: units, exposure graph (250 m and more), sampler")
    assignment = design.draw()
    stages.done("draw the assignment")
    trial_path = out / "trial.gpkg"
    write_trial(trial_path, design, assignment)
    stages.done(f"exposure probabilities ({n_draws:,} draws), write trial file")
    return grid, design, assignment, rate, rng, trial_path


def city_case(out: Path, n_units: int, n_draws: int) -> None:
    from geoexp.outcomes import OutcomeTable
    from geoexp.trialfile import TrialFile

    stages = Stages()
    _, design, assignment, rate, rng, trial_path = _city(out, n_units, N_TREATED, n_draws, stages)
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
    # the analysis rebuilds the design from the trial file: let go of this one first, so
    # that the peak memory of the analysis is its own
    del design, assignment, frame
    gc.collect()
    _analyse(trial_path, outcomes, n_draws, stages)
    _shared_baseline(trial_path, n_draws, stages)
    _kernel_baseline(trial_path, n_draws, stages)


def job_case(out: Path, n_units: int, n_treated: int, n_draws: int) -> None:
    import geopandas as gpd
    import shapely

    from geoexp.outcomes import count_incidents
    from geoexp.report import write_report
    from geoexp.trialfile import TrialFile

    stages = Stages()
    # hot spots: the top segments by baseline, ten for every treated one, so that a segment's
    # chance of treatment (10%) clears the default positivity floor of 0.05
    grid, design, assignment, rate, rng, trial_path = _city(
        out, n_units, n_treated, n_draws, stages, top_share=min(0.5, 10 * n_treated / n_units)
    )
    conditions = assignment.to_frame()["condition"].to_numpy()
    multiplier = pd.Series(conditions).map(EFFECTS).fillna(1.0).to_numpy()
    # invented incidents: Poisson counts per segment and period, each a point on its segment
    pre, post = rng.poisson(rate), rng.poisson(rate * multiplier)
    lines = grid.geometry.to_numpy()
    where = np.concatenate(
        [np.repeat(np.arange(rate.size), pre), np.repeat(np.arange(rate.size), post)]
    )
    points = shapely.line_interpolate_point(
        lines[where], rng.uniform(0, 1, where.size), normalized=True
    )
    days = np.concatenate(
        [rng.integers(0, 365, int(pre.sum())), 365 + rng.integers(0, 365, int(post.sum()))]
    )
    incidents = gpd.GeoDataFrame(
        {"date": np.datetime64("2025-01-01") + days.astype("timedelta64[D]")},
        geometry=points,
        crs=grid.crs,
    )
    stages.done(f"invent {where.size:,} incident points on the segments")
    tf = TrialFile.open(trial_path)
    outcomes = count_incidents(
        tf,
        incidents,
        date_column="date",
        tolerance_m=30.0,
        pre=("2025-01-01", "2025-12-31"),
        post=("2026-01-01", "2026-12-31"),
    )
    stages.done("count incidents onto segments")
    del grid, design, assignment, incidents, points, lines, where, days
    gc.collect()
    result = _analyse(trial_path, outcomes, n_draws, stages)
    write_report(result, out / "report.html", trial=tf)
    stages.done("report (HTML and Markdown, static map)")


def child(case: str, n_units: int, n_draws: int, n_treated: int) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        if case == "region":
            region_case(Path(tmp), n_draws)
        elif case == "city":
            city_case(Path(tmp), n_units, n_draws)
        else:
            job_case(Path(tmp), n_units, n_treated, n_draws)


def parent(
    case: str, n_units: int, n_draws: int, results: str | None = None, n_treated: int = N_TREATED
) -> None:
    title = "sample region" if case == "region" else f"generated city, {n_units:,} segments"
    if case == "job":
        title = f"whole job, {title}, {n_treated:,} treated"
    print(f"\n== {title}: {n_draws:,} draws per test ==")
    print(f"{'stage':<62}{'wall s':>8}{'CPU s':>8}{'peak RSS MB':>13}{'load':>6}")
    cmd = [sys.executable, __file__, "--child", case, "--n", str(n_units), "--draws", str(n_draws)]
    cmd += ["--treated", str(n_treated)]
    if results is not None:
        cmd += ["--results", f"{results}.{case}.pkl"]
    start = time.perf_counter()
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, text=True)
    assert proc.stdout is not None
    for line in proc.stdout:
        try:
            row = json.loads(line)
        except json.JSONDecodeError:
            continue
        if "stage" in row:
            print(
                f"{row['stage']:<62}{row['seconds']:>8.1f}{row['cpu']:>8.1f}"
                f"{row['peak_mb']:>13,.0f}{row['load']:>6.1f}"
            )
        elif "note" in row:
            print(row["note"])
        elif "result" in row:
            for r in row["result"]:
                print(
                    f"    {r['contrast']:<36} {r['estimate']:+.3f} (SE {r['std_error']:.3f}) "
                    f"p={r['p_value']:.3f} p(no spillover)={r['p_value_no_spillover']:.3f}"
                )
    if proc.wait():
        raise SystemExit(f"the {case} case failed")
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime + after.ru_stime) - (before.ru_utime + before.ru_stime)
    print(
        f"{'whole subprocess (imports included)':<62}{time.perf_counter() - start:>8.1f}"
        f"{cpu:>8.1f}{after.ru_maxrss / 1024:>13,.0f}{_load():>6.1f}"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--case", choices=["region", "city", "both", "job"], default="both")
    parser.add_argument("--n", type=int, default=100_000, help="segments of the generated city")
    parser.add_argument(
        "--segments", type=int, default=1_000_000, help="segments of the whole job's city"
    )
    parser.add_argument("--treated", type=int, default=5_000, help="treated units of the job")
    parser.add_argument("--draws", type=int, default=2_000, help="draws per test")
    parser.add_argument(
        "--results",
        help="write each case's full result table (pickle) to RESULTS.<case>.pkl",
    )
    parser.add_argument("--child", choices=["region", "city", "job"], help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        global _RESULTS_PATH
        _RESULTS_PATH = args.results
        child(args.child, args.n, args.draws, args.treated)
        return
    if args.case == "job":
        parent("job", args.segments, args.draws, args.results, args.treated)
        return
    for case in ("region", "city") if args.case == "both" else (args.case,):
        parent(case, args.n, args.draws, args.results)


if __name__ == "__main__":
    main()
