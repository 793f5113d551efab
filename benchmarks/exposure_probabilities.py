"""Monte Carlo exposure probabilities: draws per second of the scatter engines.

Run: python benchmarks/exposure_probabilities.py [--quick]

For 10,000 draws of complete randomization over all units (m = 200 and
2,000 treated) on synthetic street grids of 10k and 100k segments, with one
250 m spillover band, prints per case:

- ``numba`` and ``numpy``: the scatter kernels alone (the draws are made
  first), in draws per second, with the effective bytes per second of the
  scatter: the CSR neighbour data it must read (indices and distances of the
  treated units' rows, plus their row pointers);
- ``end-to-end``: :func:`geoexp.exposure.exposure_probabilities` with the
  sampler included, in seconds for the whole run;
- baselines measured in the same run (the machine is shared, so read the
  ratios): a numpy memory-bandwidth figure (copy of a 256 MB array, bytes read
  plus written per second), and a per-draw loop of scipy.sparse
  matrix-vector products (the 250 m adjacency times the treatment
  indicator), timed on a subset of draws and scaled to all of them.

The two engines must give identical counts; the script checks it. The numpy
twin at m = 2,000 is timed on a fifth of the draws and scaled.
"""

from __future__ import annotations

import argparse
import time
from functools import partial

import numpy as np
import scipy.sparse as sp

from geoexp.design._samplers import CompleteSampler
from geoexp.exposure import ExposureMapping, exposure_probabilities
from geoexp.exposure._kernels import scatter_counts
from geoexp.graph import ExposureGraph
from geoexp.sampleregion._grid import synthetic_grid

BAND = 250.0
SEED = 20260101


def bandwidth() -> float:
    """Bytes per second (read + written) of a numpy copy of a 256 MB array: best of 3."""
    src = np.ones(32_000_000)
    dst = np.empty_like(src)
    best = np.inf
    for _ in range(3):
        start = time.perf_counter()
        np.copyto(dst, src)
        best = min(best, time.perf_counter() - start)
    return 2 * src.nbytes / best


def timed(function, repeat: int = 1) -> tuple[float, object]:
    best, out = np.inf, None
    for _ in range(repeat):
        start = time.perf_counter()
        out = function()
        best = min(best, time.perf_counter() - start)
    return best, out


def touched_bytes(graph: ExposureGraph, indptr: np.ndarray, indices: np.ndarray) -> int:
    """Bytes of CSR data the scatter reads: 4 B index + 8 B distance per neighbour, 16 B pointers."""
    degree = np.diff(graph.indptr)[indices]
    return int(degree.sum()) * (graph.indices.itemsize + graph.distances.itemsize) + 16 * len(
        indices
    )


def sparse_loop_seconds(graph: ExposureGraph, draws, n_draws: int, sample: int) -> float:
    """Per-draw scipy.sparse product loop (the naive engine), scaled from ``sample`` draws."""
    adjacency = sp.csr_array(
        (np.ones(graph.indices.size), graph.indices, graph.indptr), shape=(graph.n, graph.n)
    )
    start = time.perf_counter()
    for r in range(sample):
        x = np.zeros(graph.n)
        x[draws.indices[draws.indptr[r] : draws.indptr[r + 1]]] = 1.0
        near = adjacency @ x
        _ = (near > 0) & (x == 0)
    return (time.perf_counter() - start) * n_draws / sample


def scatter(draws, graph: ExposureGraph, edges, engine: str, n_draws: int) -> np.ndarray:
    """Counts of the first ``n_draws`` draws by one engine."""
    return scatter_counts(
        draws.indptr[: n_draws + 1],
        draws.indices[: draws.indptr[n_draws]],
        graph.indptr,
        graph.indices,
        graph.distances,
        edges,
        graph.n,
        engine=engine,
    )[0]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="1,000 draws instead of 10,000")
    args = parser.parse_args()
    n_draws = 1_000 if args.quick else 10_000
    mapping = ExposureMapping((BAND,))
    edges = np.asarray(mapping.band_edges)
    bw = bandwidth()
    # compile the numba kernel before timing
    tiny = ExposureGraph.from_geometries(synthetic_grid(50).geometry, BAND)
    exposure_probabilities(CompleteSampler(50, None, 5), tiny, mapping, 10, 0)
    print(
        f"{n_draws:,} draws per case, one {BAND:g} m band, complete randomization over all units."
    )
    print(f"numpy memory bandwidth (copy, read + write): {bw / 1e9:.1f} GB/s")
    print(
        f"{'n':>8} {'m':>6} {'engine':<11}{'seconds':>9}{'draws/s':>11}{'GB/s':>7}"
        f"{'% of bw':>8}{'x sparse':>9}{'x numpy':>8}"
    )
    for n in (10_000, 100_000):
        graph = ExposureGraph.from_geometries(synthetic_grid(n).geometry, BAND)
        for m in (200, 2_000):
            sampler = CompleteSampler(n, None, m)
            draws = sampler.draw_many(n_draws, SEED)
            nbytes = touched_bytes(graph, draws.indptr, draws.indices)
            sparse_s = sparse_loop_seconds(graph, draws, n_draws, max(n_draws // 50, 50))
            # the numpy twin at m = 2,000 is timed on a fifth of the draws and scaled
            part = n_draws if m <= 200 else n_draws // 5
            seconds, results = {}, {}
            for engine, k, repeat in (("numba", n_draws, 2), ("numpy", part, 1)):
                took, results[engine] = timed(
                    partial(scatter, draws, graph, edges, engine, k), repeat
                )
                seconds[engine] = took * n_draws / k
            numba_part = scatter(draws, graph, edges, "numba", part)
            if not np.array_equal(numba_part, results["numpy"]):
                raise SystemExit(f"engines disagree at n={n}, m={m}")
            seconds["end-to-end"], _ = timed(
                partial(exposure_probabilities, sampler, graph, mapping, n_draws, SEED)
            )
            for engine in ("numba", "numpy", "end-to-end"):
                s = seconds[engine]
                gbs = nbytes / s / 1e9
                print(
                    f"{n:>8,} {m:>6,} {engine:<11}{s:>9.2f}{n_draws / s:>11,.0f}{gbs:>7.2f}"
                    f"{100 * nbytes / s / bw:>7.0f}%{sparse_s / s:>9.1f}"
                    f"{seconds['numpy'] / s:>8.1f}"
                )
            print(
                f"{n:>8,} {m:>6,} {'sparse loop':<11}{sparse_s:>9.2f}{n_draws / sparse_s:>11,.0f}"
                f"   (per-draw scipy.sparse product, scaled from "
                f"{max(n_draws // 50, 50)} draws)"
            )


if __name__ == "__main__":
    main()
