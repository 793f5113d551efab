"""Draws per second of the complete and kept-apart samplers.

Run: python benchmarks/sampling.py [--quick]

For 10,000 draws at n = 10k and 100k units (all eligible) and m = 200 and
2,000 treated, prints draws per second of CompleteSampler and
SeparatedSampler (gap 150 m on a synthetic street grid), beside a baseline
measured in the same run: the naive approach, a Python loop calling
``rng.choice(n, m, replace=False)`` once per draw. The machine is shared, so
read the ratios, not the absolute numbers.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import shapely

from geoexp.design._samplers import CompleteSampler, SeparatedSampler
from geoexp.errors import InfeasibleDesignError
from geoexp.sampleregion._grid import synthetic_grid

GAP = 150.0


def gap_graph(n: int) -> tuple[np.ndarray, np.ndarray]:
    """CSR of street segments closer than GAP metres (shapely STRtree, exact distances)."""
    geometry = np.asarray(synthetic_grid(n).geometry.array)
    first, second = shapely.STRtree(geometry).query(geometry, predicate="dwithin", distance=GAP)
    close = (first != second) & (shapely.distance(geometry[first], geometry[second]) < GAP)
    first, second = first[close], second[close]
    order = np.lexsort((second, first))
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(first, minlength=n), out=indptr[1:])
    return indptr, second[order].astype(np.int32)


def rate(function, n_draws: int) -> float:
    start = time.perf_counter()
    function(n_draws)
    return n_draws / (time.perf_counter() - start)


def naive(n: int, m: int):
    rng = np.random.default_rng(0)

    def run(n_draws: int) -> None:
        for _ in range(n_draws):
            np.sort(rng.choice(n, m, replace=False))

    return run


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="1,000 draws instead of 10,000")
    args = parser.parse_args()
    n_draws = 1_000 if args.quick else 10_000
    CompleteSampler(100, None, 5).draw_many(10, 0)  # load / compile kernels before timing
    print(f"{n_draws:,} draws per case; baseline = per-draw Python loop of rng.choice(n, m)")
    print(f"{'sampler':<22}{'n':>9}{'m':>7}{'draws/s':>12}{'naive/s':>12}{'ratio':>8}")
    for n in (10_000, 100_000):
        start = time.perf_counter()
        graph = gap_graph(n)
        print(
            f"(gap graph for n={n:,}: {time.perf_counter() - start:.1f} s, "
            f"{graph[1].size / n:.1f} neighbours per unit within {GAP:g} m)"
        )
        for m in (200, 2_000):
            baseline = rate(naive(n, m), max(n_draws // 10, 100))
            complete = CompleteSampler(n, None, m)
            r = rate(lambda k, s=complete: s.draw_many(k, 1), n_draws)
            print(
                f"{'complete':<22}{n:>9,}{m:>7,}{r:>12,.0f}{baseline:>12,.0f}{r / baseline:>8.1f}"
            )
            for engine, k in (("numba", n_draws), ("numpy", max(n_draws // 20, 256))):
                try:
                    separated = SeparatedSampler(n, None, m, graph, engine=engine, gap=GAP)
                except InfeasibleDesignError as err:
                    print(f"{'separated/' + engine:<22}{n:>9,}{m:>7,}  infeasible: {err}")
                    break
                r = rate(lambda k, s=separated: s.draw_many(k, 1), k)
                print(
                    f"{'separated/' + engine:<22}{n:>9,}{m:>7,}{r:>12,.0f}{baseline:>12,.0f}"
                    f"{r / baseline:>8.1f}"
                )


if __name__ == "__main__":
    main()
