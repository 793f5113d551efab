"""The variance step under the thread policy against the BLAS library's default threads.

Run: python benchmarks/variance_threads.py [--calls 200] [--draws 2000]

The demo design of the invented sample city (40 of the top 150 hot-spot
segments kept 150 m apart, bands 150/300 m) is drawn once, its condition bits
taken over ``--draws`` draws, and the conservative variance of the treated vs
pure-control Hajek contrast (Aronow & Samii 2017) computed ``--calls`` times,
its joint-probability blocks recomputed on every call (the cache cleared), as
the analysis, test inversion and power runs compute many of them:

- ``default``: the BLAS library starts as many threads as it likes (its default);
- ``policy``: inside :func:`geoexp._engine.compute_threads` (one BLAS thread),
  as :func:`geoexp.estimate.estimate_contrast` now runs it.

Both orders are measured twice (default, policy, default, policy) and the best
of each kept; the results of both must be the same number. The machine is
shared: read the ratio, not the seconds.
"""

from __future__ import annotations

import argparse
import tempfile
import time

import numpy as np
from threadpoolctl import threadpool_info

from geoexp._engine import compute_threads
from geoexp.design import Design
from geoexp.estimate._horvitz import variance_terms
from geoexp.exposure import condition_bits
from geoexp.quickstart import demo_spec
from geoexp.sampleregion import load_sample_region


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--calls", type=int, default=200)
    parser.add_argument("--draws", type=int, default=2000)
    args = parser.parse_args()

    region = load_sample_region()
    with tempfile.TemporaryDirectory() as out:
        design = Design.from_spec(demo_spec(region.path, out))
    mapping = design.mapping
    pc = mapping.pure_control
    bits = condition_bits(design.sampler, design.graph, mapping, args.draws, 1)
    probs = bits.probabilities()
    observed = design.draw().conditions
    y = np.random.default_rng(2).poisson(3.0, design.units.n).astype(float)
    pop = np.flatnonzero((probs[:, 0] > 0) & (probs[:, pc] > 0))
    d = observed[pop]
    resid = y[pop] - y[pop].mean()

    def run() -> tuple[float, float]:
        start = time.perf_counter()
        for _ in range(args.calls):
            bits._cache.clear()
            vk, vl, cov, _ = variance_terms(
                resid, d, 0, pc, probs[pop, 0], probs[pop, pc], bits, pop
            )
        return time.perf_counter() - start, vk + vl - 2 * cov

    blas = [
        f"{i['internal_api']} {i['version']} ({i['num_threads']} threads)"
        for i in threadpool_info()
        if i["user_api"] == "blas"
    ]
    print(f"BLAS: {', '.join(blas) or 'none found'}; units in the contrast: {pop.size}")
    run()  # warm up
    best = {"default": np.inf, "policy": np.inf}
    value = {}
    for _ in range(2):
        seconds, value["default"] = run()
        best["default"] = min(best["default"], seconds)
        with compute_threads():
            seconds, value["policy"] = run()
        best["policy"] = min(best["policy"], seconds)
    assert np.isclose(value["default"], value["policy"], rtol=1e-12), value
    print(
        f"{args.calls} variance calls, {args.draws} draws: default BLAS threads "
        f"{best['default']:.2f} s; one thread (the policy) {best['policy']:.2f} s; "
        f"ratio {best['default'] / best['policy']:.1f}x"
    )


if __name__ == "__main__":
    main()
