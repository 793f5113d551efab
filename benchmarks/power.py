"""Power by simulation on the sample city's demo design: the engine against a per-trial loop.

Run: python benchmarks/power.py [--sims 200] [--draws 500] [--naive 4]

The demo design (40 of the top 150 hot-spot segments of the invented city,
kept 150 m apart, bands 150/300 m) with negative binomial counts (baseline
from last year's counts, dispersion 0.5, treated x0.8, first band x0.95).
Prints:

- ``engine``: :func:`geoexp.power.simulate_power` with ``--sims`` simulated
  trials and ``--draws`` randomization draws each, in seconds (best of 2);
- ``naive``: the obvious loop measured in the same run on ``--naive`` simulated
  trials and scaled: per trial, draw an assignment, draw outcomes, then run
  :func:`geoexp.inference.fisher_test` for treated units and
  :func:`geoexp.inference.spillover_test` for each band (each a pass of the
  exposure engine over ``--draws`` draws); the exposure probabilities are
  computed once and added once;
- their ratio (the machine is shared; read the ratio, not the seconds).
"""

from __future__ import annotations

import argparse
import tempfile
import time

import numpy as np

from geoexp._rng import Stream
from geoexp.design import Design
from geoexp.exposure import assign_conditions, condition_bits
from geoexp.inference import ContrastSpec, fisher_test, spillover_test
from geoexp.power import NegativeBinomialOutcome, simulate_power
from geoexp.quickstart import demo_spec
from geoexp.sampleregion import load_sample_region


def naive_seconds(design: Design, model: NegativeBinomialOutcome, n_trials: int, n_draws: int):
    """Seconds of the per-trial loop for ``n_trials`` trials, and of the probabilities once."""
    mapping = design.mapping
    pc = mapping.pure_control
    start = time.perf_counter()
    probs = condition_bits(
        design.sampler, design.graph, mapping, design.spec.draws, design.stream(Stream.MONTE_CARLO)
    ).probabilities()
    prob_seconds = time.perf_counter() - start
    means = model.unit_means(design)
    effects = model.effects(mapping)
    every = np.ones(design.units.n, dtype=bool)
    rng = np.random.default_rng(1)
    start = time.perf_counter()
    for trial in range(n_trials):
        treated_pos = design.sampler.draw(np.random.SeedSequence([7, trial]))
        treated = np.zeros(design.units.n, dtype=bool)
        treated[treated_pos] = True
        observed = assign_conditions(design.graph, mapping, treated_pos).astype(np.int64)
        y = model.sample(model.expected(means, effects, observed), rng) - model.sample(means, rng)
        fisher_test(design, observed, y, probs, ContrastSpec(0, pc, every), n_draws=n_draws)
        for band in range(1, pc):
            spillover_test(design, observed, treated, y, probs, band, n_draws=n_draws)
    return time.perf_counter() - start, prob_seconds


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sims", type=int, default=200)
    parser.add_argument("--draws", type=int, default=500)
    parser.add_argument("--naive", type=int, default=4, help="trials timed for the naive loop")
    args = parser.parse_args()

    region = load_sample_region()
    with tempfile.TemporaryDirectory() as out:
        design = Design.from_spec(demo_spec(region.path, out))
    model = NegativeBinomialOutcome("incidents_y1", 0.5, {"treated": 0.8, "spillover_1": 0.95})
    simulate_power(design, model, n_sims=5, n_draws=5)  # compile the kernels first

    best, result = np.inf, None
    for _ in range(2):
        start = time.perf_counter()
        result = simulate_power(design, model, n_sims=args.sims, n_draws=args.draws)
        best = min(best, time.perf_counter() - start)

    loop, prob = naive_seconds(design, model, args.naive, args.draws)
    naive = prob + loop / args.naive * args.sims
    print(f"design: {design.units.n} segments, {int(design.eligible.sum())} eligible")
    print(f"engine: {args.sims} simulated trials x {args.draws} draws: {best:.2f} s")
    print(
        f"naive : per-trial fisher_test + spillover_test, {args.naive} trials timed "
        f"({loop:.2f} s) and scaled, probabilities once ({prob:.2f} s): {naive:.1f} s"
    )
    print(f"ratio : naive / engine = {naive / best:.0f}x")
    print()
    print(result)


if __name__ == "__main__":
    main()
