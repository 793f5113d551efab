"""Benchmark: building the exposure graph, beside baselines measured in the same run.

Each case runs in its own subprocess so that its peak resident memory
(``ru_maxrss``, which sees numpy and GEOS allocations, unlike tracemalloc) is
its own. The peak includes the interpreter, imports and the generated layer;
the "base" column is the resident memory just before the timed step.

Usage::

    python benchmarks/graph_build.py            # 10k, 100k, 1M segments; 100k parcels; network
    python benchmarks/graph_build.py --quick    # 10k only (smoke run)
    python benchmarks/graph_build.py --full     # also the slow baselines at 1M
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

DISTANCE = 250.0
NETWORK_DISTANCE = 500.0


def _rss_mb() -> float:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    return float("nan")


def child(case: str, n: int, kind: str) -> dict:
    import numpy as np
    import shapely

    from geoexp.graph import ExposureGraph
    from geoexp.sampleregion import synthetic_grid

    grid = synthetic_grid(n, kind=kind, jitter=0.0)
    geoms = grid.geometry
    extra: dict = {}
    if case.startswith("network"):
        # Load the compiled kernel from numba's cache outside the timing.
        ExposureGraph.from_geometries(synthetic_grid(5000).geometry, 300.0, metric="network")
    base = _rss_mb()
    t0 = time.perf_counter()
    if case == "ours":
        graph = ExposureGraph.from_geometries(geoms, DISTANCE)
        pairs = graph.n_pairs
    elif case == "kdtree_centroids":
        from scipy.spatial import cKDTree

        cent = shapely.get_coordinates(shapely.centroid(np.asarray(geoms.values)))
        pairs = len(cKDTree(cent).query_pairs(DISTANCE, output_type="ndarray"))
    elif case == "strtree_dwithin":
        arr = np.asarray(geoms.values)
        left, right = shapely.STRtree(arr).query(arr, predicate="dwithin", distance=DISTANCE)
        pairs = int(np.count_nonzero(left < right))
    elif case == "libpysal_band":
        from libpysal.graph import Graph

        band = Graph.build_distance_band(geoms.centroid, DISTANCE)
        adj = band.adjacency.reset_index()
        pairs = int(((adj["focal"] != adj["neighbor"]) & (adj["weight"] > 0)).sum()) // 2
    elif case in ("network_numba", "network_numpy"):
        engine = case.split("_")[1]
        graph = ExposureGraph.from_geometries(
            geoms, NETWORK_DISTANCE, metric="network", engine=engine
        )
        pairs = graph.n_pairs
    else:
        raise SystemExit(f"unknown case {case}")
    seconds = time.perf_counter() - t0
    # Peak before the bookkeeping below, which is not part of the build.
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    if case == "ours":
        # True pairs a centroid KD-tree query at the same distance would miss.
        cent = shapely.get_coordinates(shapely.centroid(np.asarray(geoms.values)))
        coo = graph.matrix.tocoo()
        upper = coo.row < coo.col
        gap = np.hypot(*(cent[coo.row[upper]] - cent[coo.col[upper]]).T)
        extra["missed_by_centroids"] = int(np.count_nonzero(gap > DISTANCE))
    return {"seconds": seconds, "pairs": int(pairs), "peak_mb": peak, "base_mb": base, **extra}


def run(case: str, n: int, kind: str) -> dict:
    cmd = [sys.executable, __file__, "--child", case, str(n), kind]
    # The repository root on the path, so the benchmark runs from a checkout.
    root = str(Path(__file__).resolve().parents[1])
    env = dict(
        os.environ, PYTHONPATH=os.pathsep.join(filter(None, [root, os.environ.get("PYTHONPATH")]))
    )
    out = subprocess.run(cmd, capture_output=True, text=True, env=env)
    if out.returncode != 0:
        return {"error": out.stderr.strip().splitlines()[-1] if out.stderr else "failed"}
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="10k units only (smoke run)")
    parser.add_argument("--full", action="store_true", help="run the slow baselines at 1M too")
    parser.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        case, n, kind = args.child
        print(json.dumps(child(case, int(n), kind)))
        return

    sizes = [10_000] if args.quick else [10_000, 100_000, 1_000_000]
    plan = [(n, "segment") for n in sizes] + [(10_000 if args.quick else 100_000, "parcel")]
    rows = []
    for n, kind in plan:
        slow_ok = n < 1_000_000 or args.full
        cases = ["ours", "kdtree_centroids"]
        cases += ["strtree_dwithin", "libpysal_band"] if slow_ok else []
        results = {c: run(c, n, kind) for c in cases}
        for c in ("strtree_dwithin", "libpysal_band"):
            results.setdefault(c, {"skipped": "--full"})
        rows.append((f"euclidean {DISTANCE:g} m", n, kind, results))
    n_net = 10_000 if args.quick else 100_000
    net = {"network_numba": run("network_numba", n_net, "segment")}
    net["network_numpy"] = run("network_numpy", n_net, "segment")
    rows.append((f"network {NETWORK_DISTANCE:g} m", n_net, "segment", net))

    header = (
        f"{'graph':<16}{'units':>10} {'kind':<8}{'method':<18}{'seconds':>9}{'pairs':>12}"
        f"{'peak MB':>9}{'base MB':>9}{'ours/this':>10}"
    )
    print(header)
    print("-" * len(header))
    for label, n, kind, results in rows:
        ours = results.get("ours") or results.get("network_numba")
        for method, r in results.items():
            if "seconds" not in r:
                note = r.get("skipped") and f"skipped (needs {r['skipped']})" or r.get("error")
                print(f"{label:<16}{n:>10} {kind:<8}{method:<18}  {note}")
                continue
            ratio = ours["seconds"] / r["seconds"] if "seconds" in ours else float("nan")
            print(
                f"{label:<16}{n:>10} {kind:<8}{method:<18}{r['seconds']:>9.2f}{r['pairs']:>12,}"
                f"{r['peak_mb']:>9.0f}{r['base_mb']:>9.0f}{ratio:>10.2f}"
            )
        if "missed_by_centroids" in ours:
            miss = ours["missed_by_centroids"]
            print(
                f"{'':<16}{'':>10} {'':<8}centroid KD-tree misses {miss:,} of "
                f"{ours['pairs']:,} true pairs ({miss / max(ours['pairs'], 1):.0%})"
            )


if __name__ == "__main__":
    main()
