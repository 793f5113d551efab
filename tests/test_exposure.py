"""Exposure mapping, Monte Carlo probabilities and joint probabilities."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.spatial.distance import cdist
from scipy.stats import hypergeom

from geoexp._engine import numba_module
from geoexp.design import CompleteSampler, Draws
from geoexp.errors import InputError
from geoexp.exposure import (
    ExposureMapping,
    assign_conditions,
    condition_indicators,
    exposure_probabilities,
)
from geoexp.exposure._kernels import scatter_counts
from geoexp.graph import ExposureGraph

HAVE_NUMBA = numba_module() is not None


def star_graph(n: int, band1: int, band2: int) -> ExposureGraph:
    """Unit 0 has ``band1`` neighbours at 100 m and ``band2`` at 200 m; no other pairs."""
    j = np.arange(1, 1 + band1 + band2)
    d = np.where(j <= band1, 100.0, 200.0)
    return ExposureGraph.from_pairs(
        np.arange(n), np.zeros_like(j), j, d, max_distance=300.0, metric="euclidean"
    )


def point_graph(points: np.ndarray, max_distance: float) -> ExposureGraph:
    dist = cdist(points, points)
    i, j = np.nonzero(np.triu(dist <= max_distance, k=1))
    return ExposureGraph.from_pairs(
        np.arange(len(points)), i, j, dist[i, j], max_distance=max_distance
    )


def test_complete_randomization_matches_hypergeometric():
    # [A]/[L] Aronow & Samii (2017) exposure probabilities: with m of n treated, the number of
    # treated units among a control unit's g band neighbours is scipy.stats.hypergeom(M = n - 1,
    # n = g, N = m); pi(control, none in band) = C(n-1-g, m)/C(n, m).
    n, m, g1, g2 = 10, 3, 2, 3
    graph = star_graph(n, g1, g2)
    mapping = ExposureMapping((150.0, 300.0))
    r = 40_000
    probs = exposure_probabilities(CompleteSampler(n, None, m), graph, mapping, r, rng=7)
    p, se = probs.probabilities[0], probs.mc_error[0]
    none_in_1 = hypergeom(M=n - 1, n=g1, N=m).pmf(0)  # scipy.stats.hypergeom
    none_in_12 = hypergeom(M=n - 1, n=g1 + g2, N=m).pmf(0)
    expected = np.array(
        [
            m / n,
            (1 - m / n) * (1 - none_in_1),
            (1 - m / n) * (none_in_1 - none_in_12),
            (1 - m / n) * none_in_12,
        ]
    )
    assert np.all(np.abs(p - expected) <= 4 * np.maximum(se, 1e-12))
    # worked example (n=10, m=3, g=2; C(n-1-g, m)/C(n, m) and so on): control with a treated
    # neighbour 49/120, control with none 7/24 -- analytic, binomial coefficients
    one_band = exposure_probabilities(
        CompleteSampler(n, None, m), star_graph(n, 2, 0), ExposureMapping((150.0,)), r, rng=8
    )
    q, qse = one_band.probabilities[0], one_band.mc_error[0]
    assert abs(q[1] - 49 / 120) <= 4 * qse[1]
    assert abs(q[2] - 7 / 24) <= 4 * qse[2]


def test_probability_identities():
    rng = np.random.default_rng(3)
    points = rng.uniform(0, 1000, size=(60, 2))
    graph = point_graph(points, 300.0)
    m = 7
    probs = exposure_probabilities(
        CompleteSampler(60, None, m), graph, ExposureMapping((100.0, 300.0)), 3000, rng=1
    )
    p = probs.probabilities
    # [A] each unit has exactly one condition per draw, so its probabilities sum to one
    np.testing.assert_allclose(p.sum(axis=1), 1.0)
    # [A] a fixed-m design treats exactly m units per draw: sum_i pi_i(treated) = m
    assert p[:, 0].sum() == pytest.approx(m)
    # [A] complete randomization treats every unit with probability m / n
    assert np.all(np.abs(p[:, 0] - m / 60) <= 4 * probs.mc_error[:, 0] + 1e-12)


def test_assign_conditions_matches_brute_force_nearest_distance():
    rng = np.random.default_rng(11)
    points = rng.uniform(0, 2000, size=(200, 2))
    graph = point_graph(points, 400.0)
    mapping = ExposureMapping((150.0, 400.0))
    treated = rng.choice(200, 15, replace=False)
    got = assign_conditions(graph, mapping, treated)
    # independent computation with scipy.spatial.distance.cdist
    d = cdist(points, points[treated]).min(axis=1)
    expected = np.where(d <= 150.0, 1, np.where(d <= 400.0, 2, 3))
    expected[treated] = 0
    np.testing.assert_array_equal(got, expected)


def test_bands_are_closed_on_the_right():
    graph = ExposureGraph.from_pairs(
        np.arange(3), [0, 0], [1, 2], [150.0, 150.0000001], max_distance=300.0
    )
    cond = assign_conditions(graph, ExposureMapping((150.0, 300.0)), np.array([0]))
    assert cond.tolist() == [0, 1, 2]


def random_draws(rng, n_draws, n_units, m) -> Draws:
    rows = np.stack([rng.choice(n_units, m, replace=False) for _ in range(n_draws)])
    return Draws.from_rows(np.sort(rows, axis=1), n_units)


@pytest.mark.skipif(not HAVE_NUMBA, reason="numba engine needs numba")
def test_numba_and_numpy_engines_agree_exactly():
    rng = np.random.default_rng(5)
    points = rng.uniform(0, 3000, size=(400, 2))
    graph = point_graph(points, 350.0)
    draws = random_draws(rng, 300, 400, 20)
    edges = np.array([100.0, 250.0, 350.0])
    cov = rng.normal(size=(400, 2))
    out = {}
    for engine in ("numba", "numpy"):
        out[engine] = scatter_counts(
            draws.indptr,
            draws.indices,
            graph.indptr,
            graph.indices,
            graph.distances,
            edges,
            400,
            cov,
            engine=engine,
        )
    np.testing.assert_array_equal(out["numba"][0], out["numpy"][0])
    np.testing.assert_array_equal(out["numba"][1], out["numpy"][1])
    np.testing.assert_allclose(out["numba"][2], out["numpy"][2], rtol=1e-12, atol=1e-9)


def test_counts_equal_a_draw_by_draw_loop():
    # Independent tally: the conditions of every draw from assign_conditions, counted in a loop.
    rng = np.random.default_rng(9)
    points = rng.uniform(0, 1500, size=(120, 2))
    graph = point_graph(points, 300.0)
    mapping = ExposureMapping((120.0, 300.0))
    sampler = CompleteSampler(120, None, 9)
    probs = exposure_probabilities(sampler, graph, mapping, 500, rng=21)
    draws = sampler.draw_many(500, np.random.SeedSequence(probs.seed))
    tally = np.zeros((120, 4), dtype=int)
    for r in range(draws.n_draws):
        cond = assign_conditions(graph, mapping, draws.treated(r))
        tally[np.arange(120), cond] += 1
    np.testing.assert_array_equal(probs.counts, tally)


def test_joint_probabilities_from_indicators():
    rng = np.random.default_rng(2)
    points = rng.uniform(0, 800, size=(40, 2))
    graph = point_graph(points, 300.0)
    mapping = ExposureMapping((150.0, 300.0))
    sampler = CompleteSampler(40, None, 5)
    r = 1000
    probs = exposure_probabilities(sampler, graph, mapping, r, rng=4)
    target = rng.integers(0, 4, size=40)
    ind = condition_indicators(sampler, graph, mapping, target, r, rng=4)
    # the same seed gives the same draws: marginals agree exactly with the counts
    np.testing.assert_allclose(ind.marginal(), probs.probabilities[np.arange(40), target])
    # brute force: joint frequencies from a draw-by-draw loop over the same draws
    draws = sampler.draw_many(r, np.random.SeedSequence(probs.seed))
    hits = np.stack(
        [assign_conditions(graph, mapping, draws.treated(k)) == target for k in range(r)]
    ).astype(float)
    np.testing.assert_allclose(ind.gram(), hits.T @ hits / r)
    a, b = np.array([0, 3, 7]), np.array([5, 3, 39])
    np.testing.assert_allclose(ind.joint(a, b), (hits[:, a] * hits[:, b]).mean(axis=0))


def test_joint_treated_pairs_under_complete_randomization():
    # [A] P(i and j treated) = m (m - 1) / (n (n - 1)) under complete randomization
    n, m, r = 30, 6, 20_000
    graph = ExposureGraph.from_pairs(np.arange(n), [], [], [], max_distance=100.0)
    mapping = ExposureMapping((50.0,))
    ind = condition_indicators(CompleteSampler(n, None, m), graph, mapping, np.zeros(n), r, rng=3)
    g = ind.gram()
    off = g[~np.eye(n, dtype=bool)]
    exact = m * (m - 1) / (n * (n - 1))
    se = np.sqrt(exact * (1 - exact) / r)
    assert abs(off.mean() - exact) < 4 * se
    np.testing.assert_allclose(np.diag(g), ind.marginal())


def test_positivity_lists_units_that_cannot_be_pure_controls():
    # Unit 0 is the only eligible unit next to unit 1; treating 1 of {0, 2} ...
    graph = ExposureGraph.from_pairs(np.arange(4), [0], [1], [10.0], max_distance=100.0)
    sampler = CompleteSampler(4, np.array([0, 2]), 1)
    probs = exposure_probabilities(sampler, graph, ExposureMapping((50.0,)), 400, rng=0)
    report = probs.positivity()
    band = report.contrasts[1]
    # unit 1 is in the band whenever 0 is treated, pure control otherwise: both possible
    assert 1 not in band.exposure_only
    assert report.contrasts[0].n_units == 2  # units 0 and 2 can be treated or pure control
    frame = probs.to_frame()
    assert list(frame.columns[:3]) == ["p_treated", "p_spillover_1", "p_pure_control"]


def test_mapping_validation():
    with pytest.raises(InputError, match="increase"):
        ExposureMapping((300.0, 150.0))
    with pytest.raises(InputError, match="positive"):
        ExposureMapping((0.0,))
    m = ExposureMapping((150.0, 300.0))
    assert m.labels == ("treated", "spillover 0-150 m", "spillover 150-300 m", "pure control")
    assert m.code("pure_control") == 3


def test_graph_too_narrow_is_refused():
    graph = ExposureGraph.from_pairs(np.arange(3), [0], [1], [10.0], max_distance=100.0)
    with pytest.raises(InputError, match="max_distance >= 300"):
        exposure_probabilities(
            CompleteSampler(3, None, 1), graph, ExposureMapping((150.0, 300.0)), 10
        )


def test_covariate_sums_by_condition():
    rng = np.random.default_rng(1)
    points = rng.uniform(0, 600, size=(50, 2))
    graph = point_graph(points, 200.0)
    mapping = ExposureMapping((200.0,))
    cov = pd.DataFrame({"x": rng.normal(size=50)}, index=graph.ids)
    probs = exposure_probabilities(
        CompleteSampler(50, None, 4), graph, mapping, 200, rng=5, covariates=cov
    )
    # [A] every draw's condition sizes add up to n and its covariate sums to the total
    np.testing.assert_array_equal(probs.condition_sizes.sum(axis=1), 50)
    np.testing.assert_allclose(probs.covariate_sums.sum(axis=1)[:, 0], cov["x"].sum())


@pytest.mark.skipif(not HAVE_NUMBA, reason="numba engine needs numba")
@pytest.mark.parametrize(("n_draws", "units"), [(777, None), (640, np.arange(0, 300, 7))])
def test_condition_bits_engines_agree_exactly(n_draws, units):
    from geoexp.exposure._joint import _condition_bits

    rng = np.random.default_rng(6)
    points = rng.uniform(0, 2500, size=(300, 2))
    graph = point_graph(points, 300.0)
    mapping = ExposureMapping((120.0, 300.0))
    sampler = CompleteSampler(300, None, 12)
    a = _condition_bits(sampler, graph, mapping, n_draws, 3, units=units, engine="numba")
    b = _condition_bits(sampler, graph, mapping, n_draws, 3, units=units, engine="numpy")
    np.testing.assert_array_equal(a.bits, b.bits)
    # and the bits agree with the counts of exposure_probabilities over the same draws
    probs = exposure_probabilities(sampler, graph, mapping, n_draws, rng=3)
    held = np.arange(300) if units is None else units
    np.testing.assert_allclose(a.probabilities(), probs.probabilities[held])


@pytest.mark.skipif(not HAVE_NUMBA, reason="numba engine needs numba")
def test_pair_popcounts_engines_agree_exactly():
    from geoexp.exposure._kernels import pair_popcounts

    rng = np.random.default_rng(2)
    a = rng.integers(0, 2**63, size=(50, 9), dtype=np.uint64)
    b = rng.integers(0, 2**63, size=(40, 9), dtype=np.uint64)
    first, second = rng.integers(0, 50, 500), rng.integers(0, 40, 500)
    fast = pair_popcounts(a, b, first, second, engine="numba")
    slow = pair_popcounts(a, b, first, second, engine="numpy", block=64)
    np.testing.assert_array_equal(fast, slow)
    # independent count with Python's int.bit_count
    p = 17
    expected = sum(int(x).bit_count() for x in (a[first[p]] & b[second[p]]))
    assert fast[p] == expected


@pytest.mark.parametrize("engine", ["numpy", "numba"])
def test_condition_bits_in_odd_chunks_match_distances(engine):
    if engine == "numba" and not HAVE_NUMBA:
        pytest.skip("numba engine needs numba")
    from geoexp.exposure._kernels import band_codes, condition_bits_chunk
    from geoexp.exposure._probabilities import reach_csr

    rng = np.random.default_rng(8)
    n = 120
    points = rng.uniform(0, 1500, size=(n, 2))
    graph = point_graph(points, 300.0)
    mapping = ExposureMapping((100.0, 200.0, 300.0))
    g_indptr, g_indices, g_dist = reach_csr(graph, mapping)
    g_code = band_codes(g_dist, np.asarray(mapping.band_edges))
    n_draws = 150
    treated = [
        np.sort(rng.choice(n, size=rng.integers(0, 6), replace=False)) for _ in range(n_draws)
    ]
    indptr = np.concatenate(([0], np.cumsum([t.size for t in treated])))
    indices = np.concatenate(treated)
    held = rng.permutation(n)[:70]  # held rows in no particular order
    column = np.full(n, -1)
    column[held] = np.arange(held.size)
    n_cond = mapping.n_conditions
    words = np.zeros((n_cond, held.size, 3), dtype=np.uint64)  # a row of words per unit
    # chunks that start inside 32- and 64-draw words, one of a single draw
    for lo, hi in [(0, 5), (5, 40), (40, 41), (41, 100), (100, 150)]:
        condition_bits_chunk(
            indptr[lo : hi + 1] - indptr[lo],
            indices[indptr[lo] : indptr[hi]],
            g_indptr,
            g_indices,
            g_code,
            column,
            lo,
            words,
            engine=engine,
        )
    # reference from scipy's cdist: treated, else the band (0-100, 100-200, 200-300 m) of the
    # nearest treated unit; pure-control bits are the caller's (complement), so none here
    dist = cdist(points, points)
    expected = np.zeros_like(words)
    for r, t in enumerate(treated):
        nearest = dist[:, t].min(axis=1) if t.size else np.full(n, np.inf)
        cond = 1 + (nearest > 100) + (nearest > 200) + (nearest > 300)
        cond[t] = 0
        for row, unit in enumerate(held):
            if cond[unit] < n_cond - 1:
                expected[cond[unit], row, r // 64] |= np.uint64(1) << np.uint64(r % 64)
    assert expected[1:3].any()  # the bands are reached, so the check has teeth
    np.testing.assert_array_equal(words, expected)


@pytest.mark.parametrize(("gap", "rows_per_block"), [(None, 8192), (150.0, 8192), (150.0, 7)])
def test_dependence_pairs_match_a_brute_force_search(gap, rows_per_block, monkeypatch):
    # Independent construction with scipy.spatial.distance.cdist: i and j are linked when
    # eligible k1 within the reach of i and eligible k2 within the reach of j are the same
    # unit, or (kept-apart designs) closer than the gap.
    from geoexp.exposure import _joint, dependence_pairs

    monkeypatch.setattr(_joint, "_DEPENDENCE_ROWS", rows_per_block)
    rng = np.random.default_rng(8)
    points = rng.uniform(0, 1500, size=(120, 2))
    graph = point_graph(points, 300.0)
    mapping = ExposureMapping((100.0, 250.0))
    eligible = rng.uniform(size=120) < 0.3
    first, second = dependence_pairs(graph, mapping, eligible, gap=gap)
    got = set(zip(first.tolist(), second.tolist(), strict=True))
    d = cdist(points, points)
    reach = (d <= 250.0) & eligible[None, :]  # reach[i, k]: eligible k within the reach of i
    link = np.eye(120, dtype=bool)
    if gap is not None:
        link |= (d < gap) & eligible[:, None] & eligible[None, :]
    linked = (reach.astype(int) @ link.astype(int) @ reach.T.astype(int)) > 0
    np.fill_diagonal(linked, False)
    expected = set(zip(*np.nonzero(linked), strict=True))
    assert got == {(int(a), int(b)) for a, b in expected}
    assert len(got) > 0


def test_dependence_pairs_join_units_of_a_saturation_cluster():
    from geoexp.exposure import dependence_pairs

    graph = ExposureGraph.from_pairs(np.arange(6), [0, 3], [1, 4], [10.0, 10.0], max_distance=50.0)
    eligible = np.array([True, False, True, True, False, False])
    clusters = np.array(["a", "", "a", "b", "", ""], dtype=object)
    first, second = dependence_pairs(graph, ExposureMapping((20.0,)), eligible, clusters=clusters)
    pairs = set(zip(first.tolist(), second.tolist(), strict=True))
    # 0 and 2 share cluster a; 1 is reached by 0, so 1-2 are linked too; 5 is linked to none
    assert {(0, 2), (2, 0), (1, 2), (0, 1), (3, 4)} <= pairs
    assert not any(5 in p for p in pairs)


def test_banded_reach_is_built_once_and_classifies_like_the_mapping():
    from geoexp.exposure import BandedReach, band_codes

    rng = np.random.default_rng(11)
    xy = rng.uniform(0, 500, size=(80, 2))
    d = cdist(xy, xy)
    i, j = np.nonzero(np.triu(d <= 300.0, k=1))
    graph = ExposureGraph.from_pairs(np.arange(80), i, j, d[i, j], max_distance=300.0)
    mapping = ExposureMapping((100.0, 200.0))
    reach = BandedReach.of(graph, mapping)
    assert BandedReach.of(graph, mapping) is reach  # the graph is cut and classified once
    assert not reach.codes.flags.writeable
    # brute force from the full distance matrix: pairs within 200 m, bands closed on the right
    rows = np.repeat(np.arange(80), np.diff(reach.indptr))
    expected = {(a, b) for a, b in zip(*np.nonzero((d <= 200.0) & (d > 0)), strict=True)}
    assert set(zip(rows.tolist(), reach.indices.tolist(), strict=True)) == expected
    assert np.array_equal(reach.codes, np.where(d[rows, reach.indices] <= 100.0, 1, 2))
    assert np.array_equal(reach.codes, mapping.band_of(reach.distances))
    # an edge value belongs to the lower band, beyond the last edge is pure control
    assert band_codes(np.array([0.0, 100.0, 100.5, 200.0, 250.0]), (100.0, 200.0)).tolist() == [
        1,
        1,
        2,
        2,
        3,
    ]


@pytest.mark.skipif(not HAVE_NUMBA, reason="numba engine needs numba")
def test_blocked_kernel_matches_the_draw_by_draw_kernel_and_the_numpy_twin():
    # The kernel that takes 64 draws at a time against the earlier one-draw-at-a-time kernel
    # (kept as by_draw=True) and the numpy twin, on draws whose count is no multiple of 64.
    # Counts are integers: equal exactly. Sums of small integers are exact in any order, so
    # equal exactly too; sums of real weights differ only by the order of their additions.
    # Rows of zero weights (skipped by the blocked kernel) must leave the sums as they are.
    from geoexp._engine import limit_threads

    rng = np.random.default_rng(21)
    points = rng.uniform(0, 2500, size=(300, 2))
    graph = point_graph(points, 300.0)
    draws = random_draws(rng, 203, 300, 17)
    edges = np.array([120.0, 300.0])
    whole = rng.integers(-5, 6, size=(300, 3)).astype(float)
    real = rng.normal(size=(300, 3))
    whole[rng.random(300) < 0.3] = 0.0
    real[rng.random(300) < 0.3] = 0.0
    cov = np.hstack([whole, real])
    args = (draws.indptr, draws.indices, graph.indptr, graph.indices, graph.distances, edges, 300)
    blocked = scatter_counts(*args, cov, engine="numba")
    by_draw = scatter_counts(*args, cov, engine="numba", by_draw=True)
    twin = scatter_counts(*args, cov, engine="numpy")
    with limit_threads(1):
        one_thread = scatter_counts(*args, cov, engine="numba")
    for other in (by_draw, twin, one_thread):
        np.testing.assert_array_equal(blocked[0], other[0])
        np.testing.assert_array_equal(blocked[1], other[1])
        np.testing.assert_array_equal(blocked[2][:, :, :3], other[2][:, :, :3])
    # the twin and a single thread add in the same order as the blocked kernel: equal bits
    np.testing.assert_array_equal(blocked[2], twin[2])
    np.testing.assert_array_equal(blocked[2], one_thread[2])
    np.testing.assert_allclose(blocked[2], by_draw[2], rtol=1e-12, atol=1e-12)
    # [A] the sums are those of the conditions of each draw (assign_conditions), by numpy
    mapping = ExposureMapping(tuple(edges))
    for r in (0, 64, 202):
        treated = draws.indices[draws.indptr[r] : draws.indptr[r + 1]]
        cond = assign_conditions(graph, mapping, treated)
        for c in range(mapping.pure_control):
            np.testing.assert_array_equal(blocked[2][r, c, :3], whole[cond == c].sum(axis=0))
            assert blocked[1][r, c] == (cond == c).sum()
