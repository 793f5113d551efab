"""Tests of the randomization samplers (geoexp.design._samplers, _draws, _kernels).

Every check names its source: [A] an analytic identity derived here, [L] a
general-purpose reference library, [P] the published method. Seeds only make
runs repeatable; checks are properties or tolerances, never pinned draws.
"""

from __future__ import annotations

import hashlib
import itertools
import math
import os
import subprocess
import sys
from collections import Counter
from fractions import Fraction
from types import SimpleNamespace

import numpy as np
import pytest
import scipy.spatial.distance
import scipy.stats
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import geoexp.design._kernels as kernels
from geoexp.design._draws import Draws
from geoexp.design._samplers import (
    BlockedSampler,
    CompleteSampler,
    Rerandomized,
    SaturationSampler,
    SeparatedSampler,
)
from geoexp.errors import DesignError, InfeasibleDesignError, InputError

# ---------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------


def csr_from_pairs(n: int, first, second) -> tuple[np.ndarray, np.ndarray]:
    """Symmetric CSR (indptr, indices) from undirected pairs, built by hand."""
    first, second = np.asarray(first, np.int64), np.asarray(second, np.int64)
    rows = np.concatenate([first, second])
    cols = np.concatenate([second, first])
    order = np.lexsort((cols, rows))
    rows, cols = rows[order], cols[order]
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(rows, minlength=n), out=indptr[1:])
    return indptr, cols.astype(np.int32)


def gap_csr_bruteforce(points: np.ndarray, gap: float) -> tuple[np.ndarray, np.ndarray]:
    """Pairs closer than ``gap`` by brute force with scipy.spatial.distance.cdist."""
    d = scipy.spatial.distance.cdist(points, points)
    i, j = np.nonzero(np.triu(d < gap, k=1))
    return csr_from_pairs(len(points), i, j)


def path_graph(n: int) -> tuple[np.ndarray, np.ndarray]:
    return csr_from_pairs(n, np.arange(n - 1), np.arange(1, n))


def within_4_se(estimate: np.ndarray, p: np.ndarray | float, n_draws: int) -> bool:
    """|estimate - p| <= 4 Monte Carlo standard errors sqrt(p(1-p)/R) [A] binomial variance."""
    se = np.sqrt(np.asarray(p) * (1 - np.asarray(p)) / n_draws)
    return bool(np.all(np.abs(estimate - p) <= 4 * se + 1e-12))


# ---------------------------------------------------------------------------
# Draws
# ---------------------------------------------------------------------------


def test_draws_take_concat_dense_roundtrip():
    d = Draws([0, 2, 2, 5], [1, 4, 0, 2, 3], 6, {"x": np.array([7, 8, 9])})
    assert d.n_draws == 3 and list(d.counts) == [2, 0, 3]
    assert d.treated(-1).tolist() == [0, 2, 3]
    dense = d.to_dense()
    assert dense.sum() == 5 and dense[0, 4] and not dense[1].any()
    parts = [d.take([2]), d.take([0, 1])]
    back = Draws.concat(parts).take([1, 2, 0])
    assert back.equals(d)
    assert back.extra["x"].tolist() == [7, 8, 9]
    with pytest.raises(ValueError):
        d.indices[0] = 3  # immutable storage


def test_draws_validation():
    with pytest.raises(InputError):
        Draws([0, 3], [1, 2], 5)  # indptr does not end at len(indices)
    with pytest.raises(InputError):
        Draws([0, 1], [7], 5)  # position outside the layer
    with pytest.raises(InputError):
        Draws([0, 1], [1], 5, {"x": np.zeros(2)})  # extra not one row per draw


# ---------------------------------------------------------------------------
# complete randomization
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("m", [7, 20, 30])  # below half, above half (controls chosen), all
def test_complete_exact_count_distinct_eligible(m):
    eligible = np.arange(3, 63, 2)  # 30 eligible positions in a layer of 70
    draws = CompleteSampler(70, eligible, m).draw_many(500, 11, chunk=128)
    dense = draws.to_dense()
    assert (dense.sum(axis=1) == m).all()  # exactly m, and distinct (a set)
    assert not dense[:, np.setdiff1d(np.arange(70), eligible)].any()  # only eligible
    rows = [draws.treated(r) for r in range(draws.n_draws)]
    assert all((np.diff(r) > 0).all() for r in rows)  # ascending, no repeats


def test_complete_marginals_and_pairwise():
    n, m, R = 12, 4, 20_000
    dense = CompleteSampler(n, None, m).draw_many(R, 5).to_dense().astype(float)
    # [A] complete randomization: P(i treated) = m/n
    assert within_4_se(dense.mean(axis=0), m / n, R)
    # [A] P(i and j treated) = m(m-1) / (n(n-1)) for i != j
    joint = (dense.T @ dense) / R
    off = joint[~np.eye(n, dtype=bool)]
    assert within_4_se(off, m * (m - 1) / (n * (n - 1)), R)


def _subset_counts(sets, n, m):
    index = {s: k for k, s in enumerate(itertools.combinations(range(n), m))}
    counts = np.zeros(len(index), dtype=np.int64)
    for s in sets:
        counts[index[tuple(s)]] += 1
    return counts


@pytest.mark.parametrize("m", [2, 3])  # m=3 of 5 goes through the complement
def test_complete_matches_generator_choice_in_distribution(m):
    n, R = 5, 20_000
    draws = CompleteSampler(n, None, m).draw_many(R, 2024)
    ours = _subset_counts((draws.treated(r).tolist() for r in range(R)), n, m)
    rng = np.random.default_rng(99)
    ref = _subset_counts((sorted(rng.choice(n, m, replace=False)) for _ in range(R)), n, m)
    # [L] scipy.stats.chisquare: uniform over the C(5, m) = 10 subsets
    assert scipy.stats.chisquare(ours).pvalue > 1e-3
    # [L] scipy.stats.chi2_contingency: same distribution as numpy Generator.choice(replace=False)
    assert scipy.stats.chi2_contingency(np.vstack([ours, ref])).pvalue > 1e-3


def test_short_rows_are_extended_not_restarted(monkeypatch):
    # Force every row to come up short so the extension path does all the work;
    # a restart rule would bias towards quickly collected subsets.
    monkeypatch.setattr(kernels, "stream_length", lambda n, m: m)
    n, m, R = 5, 3, 20_000
    draws = CompleteSampler(n, None, 2).draw_many(R, 7)
    assert (draws.counts == 2).all()
    # [L] scipy.stats.chisquare against uniform over the 10 two-subsets
    counts = _subset_counts((draws.treated(r).tolist() for r in range(R)), n, 2)
    assert scipy.stats.chisquare(counts).pvalue > 1e-3
    blocked = BlockedSampler(8, None, np.repeat([0, 1], 4), {0: 1, 1: 3}).draw_many(300, 8)
    assert (blocked.to_dense().reshape(300, 2, 4).sum(axis=2) == [1, 3]).all()
    assert m == 3 and CompleteSampler(n, None, m).draw_many(50, 1).counts.tolist() == [m] * 50


def test_subset_engines_identical(monkeypatch):
    results = {}
    for engine in ("numba", "numpy"):
        monkeypatch.setattr(kernels, "SUBSET_ENGINE", engine)
        results[engine] = [
            CompleteSampler(300, None, 40).draw_many(700, 3, chunk=256),
            CompleteSampler(300, None, 250).draw_many(50, 3),
            SaturationSampler(
                60, None, np.repeat(np.arange(6), 10), [0, 0.3, 1], [2, 2, 2]
            ).draw_many(200, 4),
        ]
    assert all(a.equals(b) for a, b in zip(results["numba"], results["numpy"], strict=True))


def test_complete_validation():
    with pytest.raises(InfeasibleDesignError, match="only 3 units are eligible"):
        CompleteSampler(10, [1, 2, 3], 4)
    with pytest.raises(DesignError):
        CompleteSampler(10, None, 0)
    with pytest.raises(InputError, match="more than once"):
        CompleteSampler(10, [1, 1, 2], 1)
    with pytest.raises(InputError, match="outside"):
        CompleteSampler(10, [1, 12], 1)


# ---------------------------------------------------------------------------
# blocked randomization
# ---------------------------------------------------------------------------


def test_blocked_exact_quotas_and_marginals():
    n_units = 40
    eligible = np.arange(2, 38)  # 36 eligible
    labels = np.array(["north"] * 10 + ["south"] * 20 + ["east"] * 6)
    quotas = {"north": 3, "south": 15, "east": 6}
    R = 10_000
    dense = BlockedSampler(n_units, eligible, labels, quotas).draw_many(R, 1).to_dense()
    sub = dense[:, eligible]
    for name, q in quotas.items():
        in_block = labels == name
        # every draw has exactly the quota in each block (by construction of the design)
        assert (sub[:, in_block].sum(axis=1) == q).all()
        # [A] within-block complete randomization: P(treated) = quota / block size
        assert within_4_se(sub[:, in_block].mean(axis=0), q / in_block.sum(), R)
    assert not dense[:, [0, 1, 38, 39]].any()


def test_blocked_infeasible_quota_names_block():
    with pytest.raises(InfeasibleDesignError, match=r"block 'b' has 2 eligible units but quota 3"):
        BlockedSampler(5, None, ["a", "a", "a", "b", "b"], {"a": 1, "b": 3})
    with pytest.raises(DesignError, match="missing: 'b'"):
        BlockedSampler(5, None, ["a", "a", "a", "b", "b"], {"a": 1})
    with pytest.raises(DesignError, match="no eligible unit is in"):
        BlockedSampler(5, None, ["a", "a", "a", "b", "b"], {"a": 1, "b": 1, "c": 1})


# ---------------------------------------------------------------------------
# kept apart (random sequential greedy packing)
# ---------------------------------------------------------------------------


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    coords=st.lists(
        st.tuples(st.floats(0, 600), st.floats(0, 600)), min_size=2, max_size=30, unique=True
    ),
    gap=st.floats(5.0, 250.0),
    m=st.integers(1, 5),
    every_other=st.booleans(),
    seed=st.integers(0, 2**32 - 1),
)
def test_separated_property(coords, gap, m, every_other, seed):
    points = np.array(coords)
    n = len(points)
    eligible = np.arange(0, n, 2) if every_other else np.arange(n)
    m = min(m, eligible.size)
    # [L] the gap graph is built by brute force with scipy.spatial.distance.cdist
    graph = gap_csr_bruteforce(points, gap)
    try:
        fast = SeparatedSampler(n, eligible, m, graph, engine="numba", gap=gap)
    except InfeasibleDesignError as err:
        assert "largest number of treated units it placed was" in str(err)
        with pytest.raises(InfeasibleDesignError):
            SeparatedSampler(n, eligible, m, graph, engine="numpy")
        return
    draws = fast.draw_many(60, seed, chunk=16)
    assert (draws.counts == m).all()
    assert np.isin(draws.indices, eligible).all()
    for r in range(draws.n_draws):
        chosen = points[draws.treated(r)]
        # [L] no two treated units closer than the gap (scipy.spatial.distance.pdist)
        assert (scipy.spatial.distance.pdist(chosen) >= gap).all()
    # numba kernel and numpy twin: identical draws from the same stream
    assert fast.with_engine("numpy").draw_many(60, seed, chunk=16).equals(draws)


def _greedy_reference(order, neighbours, m):
    """Plain-Python greedy packing of one order; written independently of the package."""
    taken: set[int] = set()
    blocked: set[int] = set()
    for unit in order:
        if unit in taken or unit in blocked:
            continue
        taken.add(unit)
        blocked.update(neighbours[unit])
        if len(taken) == m:
            return frozenset(taken)
    return None


def test_separated_is_conditioned_greedy_packing():
    # Path 0-1-2-3-4-5, m = 3: greedy in a random order ends at one of five
    # maximal packings; {1, 4} gets stuck at 2 and must be rejected.
    n, m, R = 6, 3, 20_000
    neighbours = {i: {j for j in (i - 1, i + 1) if 0 <= j < n} for i in range(n)}
    # [A] exact law: enumerate all 720 orders, keep those that reach m
    law = Counter(
        s
        for order in itertools.permutations(range(n))
        if (s := _greedy_reference(order, neighbours, m)) is not None
    )
    sets = sorted(law, key=sorted)
    expected = np.array([law[s] for s in sets], dtype=float)
    draws = SeparatedSampler(n, None, m, path_graph(n)).draw_many(R, 77)
    observed = Counter(frozenset(draws.treated(r).tolist()) for r in range(R))
    assert set(observed) <= set(sets)
    counts = np.array([observed[s] for s in sets])
    # [L] scipy.stats.chisquare against the enumerated law
    assert scipy.stats.chisquare(counts, expected / expected.sum() * R).pvalue > 1e-3


def test_separated_with_block_quotas():
    n = 40
    indptr, indices = path_graph(n)
    blocks = np.repeat(["west", "east"], 20)
    sampler = SeparatedSampler(
        n, None, None, (indptr, indices), blocks=blocks, quotas={"west": 4, "east": 6}
    )
    draws = sampler.draw_many(300, 5)
    dense = draws.to_dense()
    assert (dense[:, :20].sum(axis=1) == 4).all() and (dense[:, 20:].sum(axis=1) == 6).all()
    assert not (dense[:, 1:] & dense[:, :-1]).any()  # [A] no two adjacent on the path
    numpy_twin = SeparatedSampler(
        n,
        None,
        None,
        (indptr, indices),
        blocks=blocks,
        quotas={"west": 4, "east": 6},
        engine="numpy",
    )
    assert numpy_twin.draw_many(300, 5).equals(draws)


def test_separated_infeasible_reports_largest_and_typical():
    # Six points within 10 m of each other and a 50 m gap: at most 1 can be treated.
    points = np.array([[0, 0], [3, 0], [0, 4], [5, 5], [2, 2], [1, 6]], dtype=float)
    graph = gap_csr_bruteforce(points, 50.0)
    with pytest.raises(InfeasibleDesignError) as err:
        SeparatedSampler(6, None, 2, graph, gap=50.0)
    message = str(err.value)
    assert "largest number of treated units it placed was 1" in message
    assert "choose at most 1 treated units, or a smaller gap than 50 m" in message
    # Path of 5: greedy packings have 2 or 3 units ({0, 2, 4} is the only 3-packing)
    with pytest.raises(InfeasibleDesignError, match="placed was 3"):
        SeparatedSampler(5, None, 4, path_graph(5))


def test_separated_from_graph_cuts_at_gap():
    # A tiny stand-in with the ExposureGraph attributes: 4 units on a line, 100 m apart.
    indptr, indices = csr_from_pairs(4, [0, 1, 2, 0, 1], [1, 2, 3, 2, 3])
    rows = np.repeat(np.arange(4), np.diff(indptr))
    Line = SimpleNamespace(
        indptr=indptr,
        indices=indices,
        distances=100.0 * np.abs(rows - indices),  # [A] points at 0, 100, 200, 300 m
        max_distance=250.0,
    )
    sampler = SeparatedSampler.from_graph(Line, 150.0, n_treated=2)
    # pairs at 100 m block, pairs at 200 m do not: {0,2}, {0,3}, {1,3} are possible
    draws = sampler.draw_many(400, 1)
    seen = {tuple(draws.treated(r).tolist()) for r in range(draws.n_draws)}
    assert seen <= {(0, 2), (0, 3), (1, 3)} and len(seen) == 3
    with pytest.raises(DesignError, match="max_distance"):
        SeparatedSampler.from_graph(Line, 300.0, n_treated=1)


# ---------------------------------------------------------------------------
# randomized saturation
# ---------------------------------------------------------------------------


def test_saturation_levels_and_within_cluster_counts():
    sizes = [5, 7, 4, 10, 3, 6]
    clusters = np.repeat(np.array(["c0", "c1", "c2", "c3", "c4", "c5"]), sizes)
    levels = [0.0, 0.5, 0.15, 1.0]
    counts = [2, 2, 1, 1]
    sampler = SaturationSampler(int(clusters.size), None, clusters, levels, counts)
    R = 4000
    draws = sampler.draw_many(R, 3)
    level = draws.extra["cluster_level"]
    assert level.shape == (R, 6) and level.dtype == np.int8
    # per draw, exactly cluster_counts[l] clusters at level l
    per_draw = np.stack([(level == k).sum(axis=1) for k in range(len(levels))], axis=1)
    assert (per_draw == counts).all()
    # [A] round half up: floor(s * n_c + 1/2) computed in exact rational arithmetic
    expected = np.array(
        [[math.floor(Fraction(str(s)) * n_c + Fraction(1, 2)) for s in levels] for n_c in sizes]
    )
    dense = draws.to_dense()
    starts = np.concatenate([[0], np.cumsum(sizes)])
    treated = np.stack([dense[:, starts[c] : starts[c + 1]].sum(axis=1) for c in range(6)], axis=1)
    assert (treated == expected[np.arange(6), level]).all()
    # [A] complete randomization of clusters to levels: P(cluster at level l) = counts[l] / C
    for k, c in enumerate(counts):
        assert within_4_se((level == k).mean(axis=0), c / 6, R)
    # [A] within a cluster at level l each unit is treated with probability m_c(l) / n_c
    at_half = level[:, 1] == 1  # cluster c1 (7 units) at 0.5: 4 of 7
    assert within_4_se(dense[at_half, 5:12].mean(axis=0), 4 / 7, int(at_half.sum()))


def test_saturation_shares_and_validation():
    clusters = np.repeat(np.arange(10), 3)
    sampler = SaturationSampler(30, None, clusters, [0, 1 / 3, 2 / 3], [0.5, 0.25, 0.25])
    # [A] largest remainder: 5, 2.5, 2.5 -> 5, 3, 2 (ties go to the lower level)
    assert sampler.level_counts.tolist() == [5, 3, 2]
    with pytest.raises(DesignError, match=r"\[0, 1\]"):
        SaturationSampler(30, None, clusters, [0, 1.2], [5, 5])
    with pytest.raises(DesignError, match="sum"):
        SaturationSampler(30, None, clusters, [0, 0.5], [5, 4])


# ---------------------------------------------------------------------------
# rerandomization
# ---------------------------------------------------------------------------


@pytest.fixture(scope="module")
def rerandomized():
    x = np.random.default_rng(12).normal(size=(400, 2))
    return Rerandomized(CompleteSampler(400, None, 100), x, 0.1, covariate_names=["a", "b"])


def test_rerandomized_threshold_and_acceptance(rerandomized):
    # [L] Morgan & Rubin (2012) acceptance threshold: scipy.stats.chi2.ppf(0.1, 2) = 0.2107210
    assert rerandomized.threshold == pytest.approx(0.2107210, abs=1e-7)
    R = 20_000
    base = rerandomized.base.draw_many(R, 8)
    rate = float((rerandomized.mahalanobis(base) <= rerandomized.threshold).mean())
    # [P] Morgan & Rubin (2012): acceptance ~ P(chi2_K <= a) = 0.1 for near-normal covariates
    assert within_4_se(rate, 0.1, R)


def test_rerandomized_accepts_only_balanced_and_shrinks_variance(rerandomized):
    x = rerandomized.covariates
    accepted = rerandomized.draw_many(1500, 9)
    distance = rerandomized.mahalanobis(accepted)
    assert (distance <= rerandomized.threshold + 1e-12).all()
    assert np.allclose(distance, accepted.extra["mahalanobis"])
    assert (accepted.counts == 100).all()

    def mean_differences(draws):
        z = draws.to_dense()
        return z @ x / 100 - (~z) @ x / 300

    base = rerandomized.base.draw_many(6000, 10)
    ratio = (
        np.trace(
            np.linalg.solve(np.cov(mean_differences(base).T), np.cov(mean_differences(accepted).T))
        )
        / 2
    )
    # [L] v_a = chi2.cdf(a, K + 2) / chi2.cdf(a, K) = 0.0517554 (Morgan & Rubin 2012, variance shrink)
    a = scipy.stats.chi2.ppf(0.1, 2)
    v_a = scipy.stats.chi2.cdf(a, 4) / scipy.stats.chi2.cdf(a, 2)
    assert v_a == pytest.approx(0.0517554, abs=1e-6)
    assert ratio == pytest.approx(v_a, rel=0.25)  # loose: finite population, 1,500 draws


def test_rerandomized_singular_covariance_names_covariates():
    base = CompleteSampler(50, None, 10)
    rng = np.random.default_rng(1)
    a, b = rng.normal(size=50), rng.normal(size=50)
    with pytest.raises(DesignError, match="constant .*'flat'"):
        Rerandomized(base, np.column_stack([a, np.full(50, 3.0)]), 0.2, ["a", "flat"])
    with pytest.raises(DesignError, match="collinear.*'a', 'b', 'sum'"):
        Rerandomized(base, np.column_stack([a, b, a + b]), 0.2, ["a", "b", "sum"])
    with pytest.raises(DesignError, match="fixed number"):
        Rerandomized(SaturationSampler(50, None, np.arange(50) % 5, [0, 1], [2, 3]), a, 0.2)


# ---------------------------------------------------------------------------
# reproducibility and the draw / draw_many / iter_chunks contract
# ---------------------------------------------------------------------------


def _samplers():
    x = np.random.default_rng(0).normal(size=(60, 2))
    return {
        "complete": CompleteSampler(80, np.arange(10, 70), 12),
        "blocked": BlockedSampler(80, np.arange(10, 70), np.arange(60) % 3, {0: 2, 1: 5, 2: 1}),
        "separated": SeparatedSampler(80, np.arange(10, 70), 8, path_graph(80)),
        "saturation": SaturationSampler(
            80, np.arange(10, 70), np.arange(60) // 10, [0, 0.5], [3, 3]
        ),
        "rerandomized": Rerandomized(CompleteSampler(80, np.arange(10, 70), 12), x, 0.3),
    }


_CHILD = """
import hashlib, sys
sys.path.insert(0, {tests!r})
from test_samplers import _samplers
for name, sampler in _samplers().items():
    d = sampler.draw_many(250, 2024, chunk=64)
    print(name, hashlib.sha256(d.indptr.tobytes() + d.indices.tobytes()).hexdigest())
"""


def _digests(draws_by_name):
    return {
        name: hashlib.sha256(d.indptr.tobytes() + d.indices.tobytes()).hexdigest()
        for name, d in draws_by_name.items()
    }


def test_same_seed_same_draws_across_processes():
    script = _CHILD.format(tests=os.path.dirname(__file__))
    outputs = [
        subprocess.run(
            [sys.executable, "-c", script], capture_output=True, text=True, check=True
        ).stdout
        for _ in range(2)
    ]
    assert outputs[0] == outputs[1]
    here = _digests({k: s.draw_many(250, 2024, chunk=64) for k, s in _samplers().items()})
    there = dict(line.split() for line in outputs[0].strip().splitlines())
    assert there == here


@pytest.mark.parametrize("name", list(_samplers()))
def test_draw_contract(name):
    sampler = _samplers()[name]
    many = sampler.draw_many(130, 31, chunk=50)
    # iter_chunks concatenated equals draw_many
    assert Draws.concat(list(sampler.iter_chunks(130, 31, chunk=50))).equals(many)
    assert [c.n_draws for c in sampler.iter_chunks(130, 31, chunk=50)] == [50, 50, 30]
    # draw() is draw_many(1).treated(0)
    assert np.array_equal(sampler.draw(31), sampler.draw_many(1, 31).treated(0))
    # a different seed gives a different draw
    assert not sampler.draw_many(130, 32, chunk=50).equals(many)
    assert isinstance(sampler.describe(), str) and sampler.describe().endswith(".")


def test_rerandomized_refuses_when_balance_is_out_of_reach():
    # [A] With quotas fixed per block and the covariate equal to the block
    # indicator, every draw has treated mean 5/6 and control mean 5/14, so M is
    # the same large number for all draws and nothing is ever accepted.
    blocks = np.repeat([1, 0], 10)
    x = blocks + np.linspace(0, 1e-3, 20)  # not constant, so S is invertible
    base = BlockedSampler(20, None, blocks, {1: 5, 0: 1})
    rerandomized = Rerandomized(base, x, 0.1, ["in block 1"])
    assert rerandomized.mahalanobis(base.draw_many(50, 1)).min() > rerandomized.threshold
    with pytest.raises(DesignError, match="far below the planned acceptance"):
        rerandomized.draw_many(5, 1)
