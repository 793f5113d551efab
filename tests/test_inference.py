"""Randomization tests: the shared significance routine, Fisher, conditional spillover, inversion."""

from __future__ import annotations

import itertools
from types import SimpleNamespace

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
from scipy.spatial.distance import cdist
from scipy.stats import chisquare, permutation_test

from geoexp.design import CompleteSampler
from geoexp.exposure import ExposureMapping, assign_conditions, exposure_probabilities
from geoexp.graph import ExposureGraph
from geoexp.inference import (
    ContrastSpec,
    FixedFocalSampler,
    fisher_test,
    invert_constant_effect,
    moran,
    significance,
    spillover_test,
)


def lattice_design(side=14, spacing=100.0, n_eligible=60, m=15, bands=(150.0,), seed=0):
    xy = np.array([(i * spacing, j * spacing) for i in range(side) for j in range(side)])
    n = len(xy)
    d = cdist(xy, xy)
    i, j = np.nonzero(np.triu(d <= bands[-1], k=1))
    graph = ExposureGraph.from_pairs(np.arange(n), i, j, d[i, j], max_distance=bands[-1])
    eligible_pos = np.sort(np.random.default_rng(seed).choice(n, n_eligible, replace=False))
    eligible = np.zeros(n, dtype=bool)
    eligible[eligible_pos] = True
    sampler = CompleteSampler(n, eligible_pos, m)
    mapping = ExposureMapping(bands)
    design = SimpleNamespace(
        sampler=sampler,
        graph=graph,
        mapping=mapping,
        eligible=eligible,
        units=SimpleNamespace(n=n),
        stream=lambda k: np.random.SeedSequence([99, k]),
    )
    return design


def test_exact_two_sample_example():
    # [A] Fisher's exact test: Y = (5,6,7 | 1,2,3), first three treated, all 20 assignments,
    # difference 4: one-sided p = 1/20 = 0.05, two-sided p = 2/20 = 0.10
    y = np.array([5, 6, 7, 1, 2, 3.0])
    stats = []
    for treated in itertools.combinations(range(6), 3):
        z = np.zeros(6, dtype=bool)
        z[list(treated)] = True
        stats.append(y[z].mean() - y[~z].mean())
    assert stats[0] == 4.0
    assert significance(4.0, stats, "greater", exact=True)[0] == pytest.approx(0.05)
    assert significance(4.0, stats, "two-sided", exact=True)[0] == pytest.approx(0.10)
    # [A] equal-tailed rule by hand: T_obs = 4 is the largest of the 20 values, so
    # P(T >= 4) = 1/20 and P(T <= 4) = 20/20; p = min(1, 2 * min(1/20, 1)) = 0.10. Here the
    # null is symmetric about 0, so the absolute-value rule gives the same 0.10.
    assert significance(4.0, stats, "absolute", exact=True)[0] == pytest.approx(0.10)
    assert significance(4.0, stats, "less", exact=True)[0] == pytest.approx(1.0)
    # and at T_obs = -8/3 (the second smallest of the 20 values: only {5,6,7} and
    # {3,6,7} as controls reach it or below): P(T <= -8/3) = 2/20 → two-sided p = 0.20
    assert sorted(stats)[1] == pytest.approx(-8 / 3)
    assert significance(-8 / 3, stats, "two-sided", exact=True)[0] == pytest.approx(0.20)


def test_equal_tailed_rule_by_hand():
    # [A] the (M + 1)/(R + 1) rule on each side: null 0..9 (R = 10), t = 2:
    # P(T >= 2) = (1 + 8)/11, P(T <= 2) = (1 + 3)/11, p = 2 * 4/11 = 8/11;
    # the absolute rule counts |T| >= 2: 8 draws, p = 9/11.
    null = np.arange(10.0)
    assert significance(2.0, null, "two-sided")[0] == pytest.approx(8 / 11)
    assert significance(2.0, null, "absolute")[0] == pytest.approx(9 / 11)
    assert significance(-1.0, null, "two-sided")[0] == pytest.approx(2 / 11)
    # vectorised: one call for many observed values, each against its own draws
    obs = np.array([2.0, -1.0, 20.0])
    p, mc, _ = significance(obs, np.tile(null, (3, 1)), "two-sided")
    assert p == pytest.approx([8 / 11, 2 / 11, 2 / 11])
    assert (mc > 0).all()


def test_equal_tailed_rule_keeps_its_power_above_alpha_on_a_skewed_null():
    # [A] an unbiased test rejects at least alpha under every alternative. The null of the
    # statistic is exponential(1) (skewed, centred away from 0); a planted shift d moves the
    # observed value to X + d. The absolute-value rule is biased: at d = -1 it rejects only
    # when X - 1 >= q_0.95 = 3.0, i.e. P = exp(-4) = 0.018 < alpha (analytic); the
    # equal-tailed rule keeps every rejection rate >= alpha up to Monte Carlo error.
    rng = np.random.default_rng(8)
    n_sims, n_draws, alpha = 2000, 399, 0.05
    null = rng.exponential(1.0, (n_sims, n_draws))
    x = rng.exponential(1.0, n_sims)
    mc = np.sqrt(alpha * (1 - alpha) / n_sims)
    for shift in (-1.5, -1.0, -0.5, -0.2, 0.0, 0.5, 1.0, 2.0):
        rate = (significance(x + shift, null, "two-sided")[0] <= alpha).mean()
        assert rate >= alpha - 3 * mc, shift
    old = (significance(x - 1.0, null, "absolute")[0] <= alpha).mean()
    assert old < alpha - 3 * mc  # the old rule's power falls below alpha
    assert abs(old - np.exp(-4)) <= 4 * np.sqrt(np.exp(-4) / n_sims)


def test_sampled_p_value_is_never_below_one_over_r_plus_one():
    # the rule of comparing absolute values is now named "absolute"
    p, mc, _ = significance(100.0, np.zeros(999), "absolute")
    assert p == pytest.approx(1 / 1000)
    assert mc > 0
    # [A] the equal-tailed two-sided rule doubles the smaller one-sided p: never below 2/(R+1)
    assert significance(100.0, np.zeros(999), "two-sided")[0] == pytest.approx(2 / 1000)
    assert significance(100.0, np.zeros(999), "greater")[0] == pytest.approx(1 / 1000)
    # NaN draws count as extreme (conservative)
    assert significance(1.0, np.array([0.0, np.nan]), "greater")[0] == pytest.approx(2 / 3)


def test_fisher_test_agrees_with_scipy_permutation_test():
    # [L] scipy.stats.permutation_test: no interference (no pairs), complete randomization: the
    # design's p-value agrees with scipy.stats.permutation_test within Monte Carlo error.
    n, m = 40, 15
    graph = ExposureGraph.from_pairs(np.arange(n), [], [], [], max_distance=10.0)
    mapping = ExposureMapping((5.0,))
    design = SimpleNamespace(
        sampler=CompleteSampler(n, None, m),
        graph=graph,
        mapping=mapping,
        eligible=np.ones(n, dtype=bool),
        units=SimpleNamespace(n=n),
    )
    rng = np.random.default_rng(4)
    treated = np.sort(rng.choice(n, m, replace=False))
    y = rng.normal(0, 1, n)
    y[treated] += 0.6
    cond = assign_conditions(graph, mapping, treated)
    # [A] with no pairs every unit is treated with probability m/n, else a pure control
    probs = np.tile([m / n, 0.0, 1 - m / n], (n, 1))
    test = fisher_test(
        design, cond, y, probs, ContrastSpec(0, 2, np.ones(n, dtype=bool)), n_draws=4000, rng=2
    )
    z = np.zeros(n, dtype=bool)
    z[treated] = True
    ref = permutation_test(
        (y[z], y[~z]),
        lambda a, b: a.mean() - b.mean(),
        permutation_type="independent",
        n_resamples=20_000,
        alternative="two-sided",
        random_state=3,
    )
    assert test.statistic == pytest.approx(y[z].mean() - y[~z].mean())
    tolerance = 4 * np.hypot(test.mc_error, np.sqrt(ref.pvalue * (1 - ref.pvalue) / 20_000))
    assert abs(test.p_value - ref.pvalue) <= tolerance


def test_conditional_toy_example():
    # [A] Athey, Eckles & Imbens (2018) conditional test: 8 units on a line, m = 4, focal units
    # {0, 2, 4, 6}: the 6 conditional assignments give T in {14,16,20,24,28,30}, p = 1/3
    z_obs = np.array([1, 0, 0, 1, 0, 1, 1, 0], dtype=bool)
    focal = np.array([0, 2, 4, 6])
    y_focal = np.array([4, 9, 8, 3.0])
    sampler = FixedFocalSampler.from_complete(CompleteSampler(8, None, 4), focal, z_obs)
    draws = sampler.base.draw_many(1, 0)  # the base completes the 2 treated among {1,3,5,7}
    assert draws.treated(0).size == 2

    def statistic(z):
        nb = np.zeros(8)
        nb[1:] += z[:-1]
        nb[:-1] += z[1:]
        return float((y_focal * nb[focal]).sum())

    chunks = list(sampler.iter_chunks(3000, 5))
    dense = np.concatenate([np.asarray(c.to_dense()) for c in chunks])
    assert (dense[:, focal] == z_obs[focal]).all()
    patterns, counts = np.unique(dense, axis=0, return_counts=True)
    assert len(patterns) == 6  # C(4, 2) conditional assignments
    assert chisquare(counts).pvalue > 0.001  # uniform over them (scipy.stats.chisquare)
    t_values = sorted(statistic(p) for p in patterns)
    assert t_values == [14, 16, 20, 24, 28, 30]
    assert statistic(z_obs) == 28
    assert significance(28, t_values, "greater", exact=True)[0] == pytest.approx(1 / 3)
    sampled = [statistic(row) for row in dense]
    p, mc, _ = significance(28, sampled, "greater")
    assert abs(p - 1 / 3) <= 4 * mc


def simulate_spillover_pvalues(effect, n_sims=240, n_draws=199):
    design = lattice_design()
    mapping = design.mapping
    probs = exposure_probabilities(
        design.sampler, design.graph, mapping, 4000, rng=11
    ).probabilities
    base = np.random.default_rng(12).gamma(2.0, 2.0, design.units.n)
    pvalues = []
    for s in range(n_sims):
        treated = design.sampler.draw(1000 + s)
        cond = assign_conditions(design.graph, mapping, treated)
        y = base - 2.0 * (cond == 0) + effect * (cond == 1)
        z = np.zeros(design.units.n, dtype=bool)
        z[treated] = True
        test = spillover_test(design, cond, z, y, probs, 1, n_draws=n_draws, rng=5000 + s)
        pvalues.append(test.p_value)
    return np.array(pvalues)


def test_conditional_spillover_test_has_its_size_and_power():
    # Athey, Eckles & Imbens (2018): under a true null of no spillover (a direct effect only), the
    # rejection rate at 5% lies within 2 Monte Carlo standard errors of 5%.
    p_null = simulate_spillover_pvalues(effect=0.0)
    rate = (p_null <= 0.05).mean()
    mc = np.sqrt(0.05 * 0.95 / p_null.size)
    assert abs(rate - 0.05) <= 2 * mc
    # planted spillover of +3 incidents next to treated units: rejected far more often
    p_alt = simulate_spillover_pvalues(effect=3.0, n_sims=40)
    assert (p_alt <= 0.05).mean() > 0.5


def test_test_inversion_covers_a_constant_effect():
    design = lattice_design(n_eligible=80, m=30)
    mapping = design.mapping
    probs = exposure_probabilities(design.sampler, design.graph, mapping, 3000, rng=1).probabilities
    base = np.random.default_rng(2).normal(10, 2, design.units.n)
    covered = 0
    for s in range(30):
        treated = design.sampler.draw(300 + s)
        cond = assign_conditions(design.graph, mapping, treated)
        y = base - 1.5 * (cond == 0) + 0.5 * (cond == 1)
        spec = ContrastSpec(0, 2, design.eligible)
        low, high = invert_constant_effect(
            design,
            cond,
            y,
            probs,
            spec,
            np.array([0.0, 0.5, 0.0]),
            n_draws=400,
            rng=700 + s,
            center=-1.5,
            scale=1.0,
        )
        assert low < high
        covered += low <= -1.5 <= high
    # 95% intervals: coverage of 30 intervals is at least 24 unless something is wrong
    # (binomial(30, 0.95) puts less than 0.1% below 24; scipy.stats.binom)
    assert covered >= 24


def test_one_contrast_statistic_for_tests_inversion_and_power():
    # [L] the Hajek contrast from weighted sums equals the difference of numpy weighted means
    rng = np.random.default_rng(4)
    y, p = rng.gamma(2.0, 2.0, 30), rng.uniform(0.1, 0.9, 30)
    k, l = np.arange(30) < 12, np.arange(30) >= 12
    from geoexp.inference import contrast_statistic

    hajek = contrast_statistic(
        (y[k] / p[k]).sum(), (1 / p[k]).sum(), (y[l] / p[l]).sum(), (1 / p[l]).sum()
    )
    assert hajek == pytest.approx(
        np.average(y[k], weights=1 / p[k]) - np.average(y[l], weights=1 / p[l])
    )
    # every caller uses this one function (not a copy of it)
    import geoexp.inference._draws as draws_module
    import geoexp.inference._models as inversion_module
    import geoexp.power._simulate as power_module

    for module in (draws_module, inversion_module, power_module):
        assert module.contrast_statistic is contrast_statistic


def test_inverted_interval_excludes_zero_exactly_when_its_test_rejects():
    # [A] test inversion (Rosenbaum 2002 [from memory]): the interval is the set of effects
    # the same test does not reject, so at the search's resolution it excludes 0 exactly when
    # the test at 0 rejects; checked over datasets with and without an effect
    from geoexp.inference import constant_effect_test

    design = lattice_design(n_eligible=80, m=30)
    mapping = design.mapping
    probs = exposure_probabilities(design.sampler, design.graph, mapping, 3000, rng=1).probabilities
    base = np.random.default_rng(3).gamma(2.0, 2.0, design.units.n)
    seen = set()
    for s, effect in enumerate((0.0, -3.0, -6.0, 0.0, -3.0, -6.0, 4.0, 0.0)):
        treated = design.sampler.draw(900 + s)
        cond = assign_conditions(design.graph, mapping, treated)
        y = base + effect * (cond == 0)
        spec = ContrastSpec(0, 2, design.eligible)
        res = constant_effect_test(design, cond, y, probs, spec, np.zeros(3), n_draws=300, rng=s)
        rejects = res.test.p_value <= 0.05
        assert res.excludes_null == rejects or not res.connected
        assert res.ci_low <= res.estimate <= res.ci_high
        seen.add(rejects)
    assert seen == {True, False}  # both cases occurred, so the check could fail


def test_rate_ratio_interval_covers_a_planted_ratio():
    # Coverage of the inverted rate-ratio interval under a true multiplicative effect; 95%
    # intervals: binomial(30, 0.95) puts less than 0.1% below 24 (scipy.stats.binom)
    from geoexp.inference import rate_ratio_test

    design = lattice_design(n_eligible=80, m=30)
    mapping = design.mapping
    probs = exposure_probabilities(design.sampler, design.graph, mapping, 3000, rng=1).probabilities
    rng = np.random.default_rng(6)
    mu = rng.gamma(2.0, 3.0, design.units.n)
    pre = rng.poisson(mu).astype(float)
    covered, rejected = 0, 0
    for s in range(30):
        treated = design.sampler.draw(400 + s)
        cond = assign_conditions(design.graph, mapping, treated)
        post = rng.poisson(mu * np.where(cond == 0, 0.6, 1.0)).astype(float)
        spec = ContrastSpec(0, 2, design.eligible)
        res = rate_ratio_test(
            design, cond, post, probs, spec, np.ones(3), n_draws=300, rng=50 + s, baseline=pre
        )
        assert res.ci_low < res.estimate < res.ci_high
        assert res.excludes_null == (res.test.p_value <= 0.05)
        covered += res.ci_low <= 0.6 <= res.ci_high
        rejected += res.test.p_value <= 0.05
    assert covered >= 24
    assert rejected >= 15  # a 40% reduction is seen in most trials


def _treated_row_pvalues(effect, band_effect, n_sims, n_draws=99):
    from geoexp.estimate import contrast_units
    from geoexp.inference import constant_effect_test

    design = lattice_design(n_eligible=80, m=30)
    mapping = design.mapping
    probs = exposure_probabilities(
        design.sampler, design.graph, mapping, 4000, rng=21
    ).probabilities
    base = np.random.default_rng(22).gamma(0.8, 4.0, design.units.n)  # skewed outcomes
    est = contrast_units(
        probs, design.eligible, 0, 2, labels=mapping.labels, group="eligible", floor=0.05
    )
    spec = ContrastSpec(0, 2, est.units)
    band = ContrastSpec(1, 2, ~design.eligible)
    out = []
    for s in range(n_sims):
        treated = design.sampler.draw(3000 + s)
        cond = assign_conditions(design.graph, mapping, treated)
        y = base + effect * (cond == 0) + band_effect * (cond == 1)
        # the band's effect in the model: its Hajek estimate on the never-eligible units
        w1, w2 = (cond == 1) & band.mask, (cond == 2) & band.mask
        plug = np.average(y[w1], weights=1 / probs[w1, 1]) - np.average(
            y[w2], weights=1 / probs[w2, 2]
        )
        res = constant_effect_test(
            design,
            cond,
            y,
            probs,
            spec,
            np.array([0.0, plug, 0.0]),
            n_draws=n_draws,
            rng=8000 + s,
            interval=False,
        )
        out.append(res.test.p_value)
    return np.array(out)


def test_treated_row_test_has_its_size_and_power_above_alpha_both_ways():
    # Size by simulation: no treated effect, a spillover of +3 in the band (plugged in at its
    # estimate): rejection at 5% within 2 Monte Carlo SE of 5% (a 3 SE margin for the
    # plug-in). Unbiasedness [A]: under small planted shifts either way on skewed outcomes
    # the equal-tailed test rejects at least alpha (up to 3 Monte Carlo SE).
    n = 160
    mc = np.sqrt(0.05 * 0.95 / n)
    rate = (_treated_row_pvalues(0.0, 3.0, n) <= 0.05).mean()
    assert abs(rate - 0.05) <= 3 * mc
    for shift in (-0.6, 0.6):
        rate = (_treated_row_pvalues(shift, 0.0, 80) <= 0.05).mean()
        assert rate >= 0.05 - 3 * np.sqrt(0.05 * 0.95 / 80), shift


def _lattice_graph(side: int) -> ExposureGraph:
    xy = np.array([(i, j) for i in range(side) for j in range(side)], dtype=float)
    d = np.hypot(*(xy[:, None, :] - xy[None, :, :]).transpose(2, 0, 1))
    i, j = np.nonzero(np.triu(d <= 1.0, k=1))
    return ExposureGraph.from_pairs(np.arange(len(xy)), i, j, d[i, j], max_distance=1.0)


def test_moran_checkerboard_is_minus_one():
    # [A] Moran (1950); Cliff & Ord (1981): a 4 x 4 rook checkerboard has Moran's I = -1
    graph = _lattice_graph(4)
    values = np.array([(i + j) % 2 for i in range(4) for j in range(4)], dtype=float)
    result = moran(graph, values, permutations=99, rng=0)
    assert result.statistic == pytest.approx(-1.0)


def test_moran_matches_esda():
    # [L] esda.moran.Moran (Moran 1950) with the same neighbours, row-standardised (Cliff &
    # Ord 1981): the same I and E[I] = -1/(n-1)
    import esda
    from libpysal.weights import W

    rng = np.random.default_rng(4)
    points = rng.uniform(0, 1000, size=(150, 2))
    graph = ExposureGraph.from_geometries(
        gpd.GeoSeries(gpd.points_from_xy(points[:, 0], points[:, 1]), crs=32633), 200.0
    )
    values = points[:, 0] / 100 + rng.normal(size=150)
    keep = graph.degree > 0
    neighbours = {
        int(i): [int(j) for j in graph.indices[graph.indptr[i] : graph.indptr[i + 1]]]
        for i in np.flatnonzero(keep)
    }
    w = W(neighbours, silence_warnings=True)
    w.transform = "r"
    ids = np.flatnonzero(keep)
    ref = esda.moran.Moran(values[ids], w, permutations=0)
    ours = moran(graph, values, permutations=199, rng=1)
    assert ours.statistic == pytest.approx(ref.I, rel=1e-10)
    assert ours.expected == pytest.approx(ref.EI, rel=1e-12)
    assert ours.p_value < 0.05  # a strong east-west trend is autocorrelated


def test_batched_tests_equal_one_test_per_contrast():
    # Rows of one condition share a pass over the same draws: each batched result must be
    # the very result of its own call with the same seed (p-values, interval ends, estimate)
    from geoexp.errors import InputError
    from geoexp.inference import (
        constant_effect_test,
        constant_effect_tests,
        rate_ratio_test,
        rate_ratio_tests,
    )

    design = lattice_design(n_eligible=80, m=30)
    mapping = design.mapping
    probs = exposure_probabilities(design.sampler, design.graph, mapping, 2000, rng=1).probabilities
    rng = np.random.default_rng(4)
    treated = design.sampler.draw(77)
    cond = assign_conditions(design.graph, mapping, treated)
    pre = rng.poisson(6.0, design.units.n).astype(float)
    post = rng.poisson(6.0 * np.where(cond == 1, 1.3, 1.0))
    y = post - pre
    halves = [design.eligible, ~design.eligible]
    specs = [ContrastSpec(1, 2, mask) for mask in halves]
    effects = np.array([-1.0, 0.0, 0.0])
    batch = constant_effect_tests(
        design, cond, y, probs, specs, effects, n_draws=400, rng=5, scales=[0.5, 2.0]
    )
    ratios = np.array([0.9, 1.0, 1.0])
    bases = [pre, None]
    rates = rate_ratio_tests(
        design, cond, post, probs, specs, ratios, n_draws=400, rng=6, baselines=bases
    )
    for spec, scale, base, add, rate in zip(specs, [0.5, 2.0], bases, batch, rates, strict=True):
        alone = constant_effect_test(
            design, cond, y, probs, spec, effects, n_draws=400, rng=5, scale=scale
        )
        assert (add.estimate, add.ci_low, add.ci_high) == (
            alone.estimate,
            alone.ci_low,
            alone.ci_high,
        )
        assert add.test.p_value == alone.test.p_value
        r_alone = rate_ratio_test(
            design, cond, post, probs, spec, ratios, n_draws=400, rng=6, baseline=base
        )
        assert (rate.estimate, rate.ci_low, rate.ci_high, rate.test.p_value) == (
            r_alone.estimate,
            r_alone.ci_low,
            r_alone.ci_high,
            r_alone.test.p_value,
        )
    assert batch[0].estimate != batch[1].estimate  # two different groups of units
    with pytest.raises(InputError):
        constant_effect_tests(
            design, cond, y, probs, [specs[0], ContrastSpec(0, 2, halves[0])], effects
        )


@pytest.mark.parametrize("max_bytes", [1, None])
def test_shared_draws_give_each_test_its_own_result(max_bytes):
    # One set of draws serves several tests: each result must be the very result of its
    # stand-alone function with the same seed, whether the columns go through in one pass or
    # (max_bytes=1) in one pass each over the same draws redrawn from the same seed.
    from geoexp.errors import InputError
    from geoexp.inference import (
        MAX_COLUMN_BYTES,
        SharedDraws,
        constant_effect_tests,
        fisher_test,
        rate_ratio_tests,
    )

    design = lattice_design(n_eligible=80, m=30)
    mapping = design.mapping
    probs = exposure_probabilities(design.sampler, design.graph, mapping, 2000, rng=1).probabilities
    rng = np.random.default_rng(4)
    treated = design.sampler.draw(77)
    cond = assign_conditions(design.graph, mapping, treated)
    pre = rng.poisson(6.0, design.units.n).astype(float)
    post = rng.poisson(6.0 * np.where(cond == 1, 1.3, np.where(cond == 0, 0.8, 1.0)))
    y = post - pre
    direct = ContrastSpec(0, 2, design.eligible)
    bands = [ContrastSpec(1, 2, m) for m in (design.eligible, ~design.eligible)]
    effects = np.array([-1.0, 0.5, 0.0])
    ratios = np.array([0.8, 1.2, 1.0])
    shared = SharedDraws(design, 400, 9, max_bytes=max_bytes or MAX_COLUMN_BYTES)
    add_band = shared.additive(cond, y, probs, bands, effects, scales=[0.5, 2.0])
    add_direct = shared.additive(cond, y, probs, [direct], effects)
    rate_band = shared.rate_ratio(cond, post, probs, bands, ratios, baselines=[pre, None])
    fisher = shared.fisher(cond, y, probs, direct, null="no effect at all")
    cols = np.column_stack([pre, post]).astype(float)
    sums = shared.sums(cols)
    with pytest.raises(InputError):
        fisher.result()  # not run yet
    shared.run()
    with pytest.raises(InputError):
        shared.fisher(cond, y, probs, direct, null="too late")
    alone = constant_effect_tests(
        design, cond, y, probs, bands, effects, n_draws=400, rng=9, scales=[0.5, 2.0]
    )
    for got, want in zip(add_band.result(), alone, strict=True):
        assert (got.estimate, got.ci_low, got.ci_high, got.test.p_value) == (
            want.estimate,
            want.ci_low,
            want.ci_high,
            want.test.p_value,
        )
    want = constant_effect_tests(design, cond, y, probs, [direct], effects, n_draws=400, rng=9)[0]
    got = add_direct.result()[0]
    assert (got.ci_low, got.ci_high, got.test.p_value) == (
        want.ci_low,
        want.ci_high,
        want.test.p_value,
    )
    alone_r = rate_ratio_tests(
        design, cond, post, probs, bands, ratios, n_draws=400, rng=9, baselines=[pre, None]
    )
    for got, want in zip(rate_band.result(), alone_r, strict=True):
        assert (got.estimate, got.ci_low, got.ci_high, got.test.p_value) == (
            want.estimate,
            want.ci_low,
            want.ci_high,
            want.test.p_value,
        )
    f_alone = fisher_test(design, cond, y, probs, direct, n_draws=400, rng=9)
    assert fisher.result().p_value == f_alone.p_value
    assert fisher.result().statistic == f_alone.statistic
    # the plain sums are the exposure engine's covariate sums over the same draws
    frame = pd.DataFrame(cols, index=design.graph.ids)
    ref = exposure_probabilities(
        design.sampler, design.graph, mapping, 400, rng=9, covariates=frame
    )
    np.testing.assert_array_equal(sums.result(), ref.covariate_sums)
    # and the draws are the design's: over every draw, each condition's sums of the constant
    # column add up to the expected number of units in it times the draws (linearity of
    # expectation: E[sum_i 1{D_i = c}] = sum_i pi_i(c); loose by Monte Carlo error)
    totals = ref.covariate_sums[:, :, 0].sum(axis=0) / 400
    expected = (probs * pre[:, None]).sum(axis=0)
    np.testing.assert_allclose(totals, expected, rtol=0.05)
