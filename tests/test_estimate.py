"""Horvitz–Thompson / Hajek contrasts, their variance, Neyman's variance, displacement indices."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
import statsmodels.api as sm

from geoexp.estimate import (
    _horvitz,
    difference_in_means,
    estimate_contrast,
    weighted_displacement_quotient,
)
from geoexp.exposure import ConditionBits

LABELS = ("treated, none", "treated, neighbour", "control, neighbour", "control, none")


def path_enumeration():
    """A path of 6 units, m = 2, all 15 assignments, four conditions (Aronow & Samii 2017 set-up)."""
    n = 6
    b = np.array([5, 8, 3, 6, 9, 4.0])
    assigns = list(itertools.combinations(range(n), 2))
    conds = np.zeros((len(assigns), n), dtype=int)
    for r, a in enumerate(assigns):
        z = np.zeros(n, dtype=int)
        z[list(a)] = 1
        nb = np.zeros(n, dtype=int)
        nb[1:] += z[:-1]
        nb[:-1] += z[1:]
        conds[r] = np.where(z == 1, np.where(nb > 0, 1, 0), np.where(nb > 0, 2, 3))
    po = np.stack([b - 3, b - 2, b + 1, b]).T
    return conds, po


def bits_of(conds: np.ndarray, n_cond: int) -> ConditionBits:
    r, n = conds.shape
    words = -(-r // 64)
    bits = np.zeros((n_cond, n, words), dtype=np.uint64)
    for c in range(n_cond):
        hit = (conds == c).T  # (n, r)
        padded = np.zeros((n, words * 64), dtype=bool)
        padded[:, :r] = hit
        bits[c] = np.packbits(padded, axis=1, bitorder="little").view(np.uint64)
    return ConditionBits(ids=None, positions=np.arange(n), bits=bits, n_draws=r)


def textbook_variance(k, l, y, d, pi, joint):
    """Aronow & Samii (2017) conservative variance, written out pair by pair (Young's terms too)."""
    n = y.size

    def v(c):
        one = (d == c).astype(float)
        p = pi[:, c]
        out = np.sum(one * (1 - p) * (y / p) ** 2)
        for i, j in itertools.permutations(range(n), 2):
            pij = joint(c, c)[i, j]
            if pij > 0:
                out += one[i] * one[j] * (pij - p[i] * p[j]) / pij * y[i] * y[j] / (p[i] * p[j])
            else:
                out += one[i] * y[i] ** 2 / (2 * p[i]) + one[j] * y[j] ** 2 / (2 * p[j])
        return out

    ok, ol = (d == k).astype(float), (d == l).astype(float)
    cov = 0.0
    for i, j in itertools.product(range(n), repeat=2):
        pij = joint(k, l)[i, j]
        if pij > 0:
            cov += (
                ok[i]
                * ol[j]
                * (pij - pi[i, k] * pi[j, l])
                / pij
                * y[i]
                * y[j]
                / (pi[i, k] * pi[j, l])
            )
        else:
            cov -= ok[i] * y[i] ** 2 / (2 * pi[i, k]) + ol[j] * y[j] ** 2 / (2 * pi[j, l])
    return (v(k) + v(l) - 2 * cov) / n**2


@pytest.mark.parametrize(("k", "truth", "true_var"), [(0, -3.0, 42.0648), (2, 1.0, 43.1449)])
def test_horvitz_thompson_is_unbiased_by_exact_enumeration(k, truth, true_var):
    # [A] Aronow & Samii (2017): HT is unbiased; exact enumeration of all 15 assignments gives
    # the true contrasts -3 (direct) and +1 (spillover) exactly
    conds, po = path_enumeration()
    bits = bits_of(conds, 4)
    pi = bits.probabilities()
    indicator = np.stack([(conds == c) for c in range(4)]).astype(float)

    def joint(a, b):
        return indicator[a].T @ indicator[b] / conds.shape[0]

    ests, variances, textbook = [], [], []
    for d in conds:
        y = po[np.arange(6), d]
        e = estimate_contrast(y, d, pi, k, 3, bits, labels=LABELS, estimator="horvitz-thompson")
        ests.append(e.estimate)
        variances.append(e.std_error**2)
        textbook.append(textbook_variance(k, 3, y, d, pi, joint))
    # [A] the HT contrast is unbiased: its mean over all assignments is the true contrast
    assert np.mean(ests) == pytest.approx(truth, abs=1e-12)
    assert np.var(ests) == pytest.approx(true_var, abs=1e-3)
    # the estimator equals the pair-by-pair formula in every assignment ...
    np.testing.assert_allclose(variances, textbook, rtol=1e-10)
    # ... and is conservative: its mean is at least the true variance
    assert np.mean(variances) >= np.var(ests)


def test_near_pairs_give_the_dense_answer_when_all_pairs_are_near(monkeypatch):
    conds, po = path_enumeration()
    bits = bits_of(conds, 4)
    pi = bits.probabilities()
    d = conds[4]
    y = po[np.arange(6), d]
    dense = estimate_contrast(y, d, pi, 2, 3, bits, labels=LABELS, estimator="horvitz-thompson")
    a, b = np.array([(i, j) for i in range(6) for j in range(6) if i != j]).T
    monkeypatch.setattr(_horvitz, "DENSE_LIMIT", 0)
    sparse = estimate_contrast(
        y, d, pi, 2, 3, bits, labels=LABELS, estimator="horvitz-thompson", near=(a, b)
    )
    assert sparse.std_error == pytest.approx(dense.std_error, rel=1e-12)
    assert sparse.joint != dense.joint


def test_trivial_mapping_gives_the_difference_in_means():
    # [A] condition = own assignment under complete randomization: pi = m/n for every unit,
    # so both HT and Hajek contrasts equal the difference in means.
    rng = np.random.default_rng(0)
    n, m = 12, 5
    assigns = list(itertools.combinations(range(n), m))
    conds = np.ones((len(assigns), n), dtype=int)
    for r, a in enumerate(assigns):
        conds[r, list(a)] = 0
    bits = bits_of(conds, 2)
    pi = bits.probabilities()
    y = rng.normal(10, 3, size=n)
    d = conds[17]
    dim = y[d == 0].mean() - y[d == 1].mean()
    for estimator in ("horvitz-thompson", "hajek"):
        e = estimate_contrast(y, d, pi, 0, 1, bits, labels=("t", "c"), estimator=estimator)
        assert e.estimate == pytest.approx(dim)


def test_neyman_standard_error_equals_hc2():
    # [L] Neyman (1923) SE = 1.4944341 equals statsmodels OLS HC2 (Samii & Aronow 2012, from memory)
    y_t, y_c = [3, 7, 2, 9, 4], [1, 0, 2, 5, 1, 3]
    y = np.array(y_t + y_c, dtype=float)
    z = np.array([1] * 5 + [0] * 6, dtype=bool)
    e = difference_in_means(y, z)
    hc2 = sm.OLS(y, sm.add_constant(z.astype(float))).fit(cov_type="HC2").bse[1]
    assert e.estimate == pytest.approx(3.0)
    assert e.std_error == pytest.approx(hc2, rel=1e-10)
    assert e.std_error == pytest.approx(1.4944341, abs=1e-6)


def test_positivity_exclusions_are_counted():
    conds, po = path_enumeration()
    bits = bits_of(conds, 4)
    pi = bits.probabilities().copy()
    pi[0, 3] = 0.0  # pretend unit 0 can never be a pure control
    d = conds[3]
    y = po[np.arange(6), d]
    e = estimate_contrast(y, d, pi, 0, 3, bits, labels=LABELS)
    assert e.n_units == 5 and e.n_excluded == 1


@pytest.mark.parametrize(
    ("counts", "wdq", "tne"),
    [
        # [A] Bowers & Johnson (2003) WDQ and TNE, computed from the formulas (not the paper's own
        # example); identity TNE = -C_a * SM * (1 + WDQ)
        ((100, 70, 80, 72, 1000, 1000), 0.266667, 38.0),
        ((50, 40, 60, 75, 500, 520), -1.05, -0.6),
    ],
)
def test_weighted_displacement_quotient(counts, wdq, tne):
    index = weighted_displacement_quotient(*counts)
    assert index.wdq == pytest.approx(wdq, abs=1e-6)
    assert index.total_net_effect == pytest.approx(tne, abs=1e-9)
    # [A] identity of Bowers & Johnson (2003): TNE = -C_a * SM * (1 + WDQ)
    c_a = counts[5]
    assert index.total_net_effect == pytest.approx(
        -c_a * index.success_measure * (1 + index.wdq), rel=1e-12
    )


def test_displacement_readings():
    assert "diffusion" in weighted_displacement_quotient(100, 70, 80, 72, 1000, 1000).reading
    assert "outweighs" in weighted_displacement_quotient(50, 40, 60, 75, 500, 520).reading
    assert "cannot be read" in weighted_displacement_quotient(50, 60, 60, 75, 500, 520).reading


def test_saturation_total_is_direct_plus_spillover():
    # [A] Hudgens & Halloran (2008); Baird et al. (2018): total = direct + spillover exactly
    from geoexp.estimate import saturation_effects

    rng = np.random.default_rng(8)
    level = rng.integers(0, 3, 300)
    treated = (rng.uniform(size=300) < np.array([0.0, 0.3, 0.6])[level]) & (level > 0)
    y = rng.poisson(4, 300).astype(float)
    table = saturation_effects(y, treated, level, np.array([0.0, 0.3, 0.6]))
    np.testing.assert_allclose(table["total"], table["direct"] + table["spillover"], rtol=1e-12)
    # and each is a plain difference of group means
    s = level == 1
    assert table.loc[0.3, "direct"] == pytest.approx(y[s & treated].mean() - y[s & ~treated].mean())


@pytest.mark.parametrize("k", [0, 1, 2])
def test_near_pairs_in_blocks_give_the_same_variance(monkeypatch, k):
    conds, po = path_enumeration()
    bits = bits_of(conds, 4)
    pi = bits.probabilities()
    # units at most two apart on the path, both orders: a strict subset of all pairs
    a, b = np.array([(i, j) for i in range(6) for j in range(6) if 0 < abs(i - j) <= 2]).T
    monkeypatch.setattr(_horvitz, "DENSE_LIMIT", 0)
    checked = 0
    for d in conds[::2]:
        y = po[np.arange(6), d]
        for estimator in ("hajek", "horvitz-thompson"):
            monkeypatch.setattr(_horvitz, "NEAR_BLOCK", 1 << 20)
            whole = estimate_contrast(
                y, d, pi, k, 3, bits, labels=LABELS, estimator=estimator, near=(a, b)
            )
            for block in (1, 3, 7):
                monkeypatch.setattr(_horvitz, "NEAR_BLOCK", block)
                part = estimate_contrast(
                    y, d, pi, k, 3, bits, labels=LABELS, estimator=estimator, near=(a, b)
                )
                # the pair terms are summed once in the same order: the same float, not just close
                assert part.std_error == whole.std_error
                checked += part.std_error > 0
    assert checked


def test_near_pairs_in_blocks_match_the_textbook_variance(monkeypatch):
    # [A] Aronow & Samii (2017) variance: with every pair near, the blocked sums equal the
    # pair-by-pair formula
    conds, po = path_enumeration()
    bits = bits_of(conds, 4)
    pi = bits.probabilities()
    indicator = np.stack([(conds == c) for c in range(4)]).astype(float)

    def joint(p, q):
        return indicator[p].T @ indicator[q] / conds.shape[0]

    a, b = np.array([(i, j) for i in range(6) for j in range(6) if i != j]).T
    monkeypatch.setattr(_horvitz, "DENSE_LIMIT", 0)
    monkeypatch.setattr(_horvitz, "NEAR_BLOCK", 4)
    for d in conds:
        y = po[np.arange(6), d]
        e = estimate_contrast(
            y, d, pi, 0, 3, bits, labels=LABELS, estimator="horvitz-thompson", near=(a, b)
        )
        assert e.std_error**2 == pytest.approx(textbook_variance(0, 3, y, d, pi, joint), rel=1e-10)


def test_kish_effective_sample_size():
    from geoexp.estimate import kish_ess

    # [A] Kish (1965): equal weights give n; weights (1, 1, 1, 1000) give
    # (1003)^2 / (3 + 10^6) = 1.00599...
    assert kish_ess(np.full(40, 3.7)) == pytest.approx(40)
    assert kish_ess(np.array([1, 1, 1, 1000.0])) == pytest.approx(1003**2 / (3 + 1000**2))
    rng = np.random.default_rng(0)
    w = rng.uniform(1, 50, 200)
    # [A] Cauchy-Schwarz: 1 <= ESS <= n
    assert 1 <= kish_ess(w) <= 200


def test_contrast_units_apply_the_floor_and_say_why():
    from geoexp.estimate import contrast_units

    # five units, conditions (treated, band, pure control)
    p = np.array(
        [
            [0.5, 0.2, 0.3],  # kept
            [0.02, 0.3, 0.68],  # treated below the floor
            [0.4, 0.6, 0.0],  # never pure control
            [0.0, 0.5, 0.5],  # never treated
            [0.3, 0.3, 0.4],  # kept
        ]
    )
    eligible = np.array([True, True, True, False, True])
    labels = ("treated", "band", "pure control")
    est = contrast_units(p, eligible, 0, 2, labels=labels, group="eligible", floor=0.05)
    assert est.units.tolist() == [True, False, False, False, True]
    assert (est.n_below_floor, est.n_never_reference) == (1, 1)
    assert "positivity floor" in est.left_out and "never pure control" in est.left_out
    # [A] expected Kish ESS n^2 / sum(1/pi): 2^2 / (1/0.5 + 1/0.3)
    assert est.expected_ess_exposure == pytest.approx(4 / (2 + 1 / 0.3))
    focal = contrast_units(p, eligible, 1, 2, labels=labels, group="never-eligible", floor=0.05)
    assert focal.units.tolist() == [False, False, False, True, False]
    none = contrast_units(p, eligible, 0, 2, labels=labels, group="eligible", floor=0.0)
    assert none.units.sum() == 3  # with no floor, every unit with both probabilities positive


def test_adjusted_contrast_equals_weighted_least_squares():
    # Lin (2013) [from memory]: the treatment coefficient of the regression of y on the
    # treatment, the centred covariate and their interaction; with unequal probabilities the
    # regression is weighted by 1/pi. [L] statsmodels WLS with the same weights.
    import statsmodels.api as sm

    from geoexp.estimate import adjusted_contrast

    rng = np.random.default_rng(1)
    n = 80
    x = rng.poisson(5, n).astype(float)
    p = rng.uniform(0.2, 0.8, (n, 2))
    observed = rng.integers(0, 2, n)
    y = 2 + 0.8 * x - 1.5 * (observed == 0) + 0.3 * x * (observed == 0) + rng.normal(0, 1, n)
    units = np.ones(n, dtype=bool)
    ours = adjusted_contrast(y, x, observed, p, 0, 1, units)
    z = (observed == 0).astype(float)
    xc = x - x.mean()
    w = 1 / p[np.arange(n), observed]
    design = np.column_stack([np.ones(n), z, xc, z * xc])
    reference = sm.WLS(y, design, weights=w).fit().params[1]
    assert ours == pytest.approx(reference, rel=1e-10)


def test_displacement_reading_needs_a_clear_direct_effect_and_parts_add_up():
    counts = (100, 70, 80, 72, 1000, 1000)
    unclear = weighted_displacement_quotient(*counts, direct_effect_clear=False)
    assert unclear.reading.startswith("not read")
    assert unclear.wdq == weighted_displacement_quotient(*counts).wdq  # descriptive value kept
    clear = weighted_displacement_quotient(*counts, direct_effect_clear=True)
    assert "diffusion" in clear.reading
    quiet = weighted_displacement_quotient(
        *counts, direct_effect_clear=True, buffer_effect_clear=False
    )
    assert quiet.reading.startswith("not read")
    # [A] TNE = target part + buffer part (Bowers & Johnson 2003), so the total over several
    # buffers counts the target area once: target part + sum of the buffer parts
    assert clear.total_net_effect == pytest.approx(clear.target_part + clear.buffer_part)
    assert clear.control_trend == pytest.approx(1.0)
    assert clear.target_part == pytest.approx(30.0) and clear.buffer_part == pytest.approx(8.0)


def test_variance_step_runs_on_one_blas_thread(monkeypatch):
    # the thread policy: the many small matrix products of the variance run on one BLAS
    # thread, whatever the library's default (threadpoolctl reports the live setting)
    from threadpoolctl import threadpool_info

    seen = []
    real = _horvitz.variance_terms

    def spy(*args, **kwargs):
        seen.extend(lib["num_threads"] for lib in threadpool_info() if lib["user_api"] == "blas")
        return real(*args, **kwargs)

    monkeypatch.setattr(_horvitz, "variance_terms", spy)
    conds, po = path_enumeration()
    bits = bits_of(conds, 4)
    d = conds[4]
    estimate_contrast(po[np.arange(6), d], d, bits.probabilities(), 2, 3, bits, labels=LABELS)
    assert seen and all(t == 1 for t in seen)


def line_trial(n: int = 40, m: int = 8, draws: int = 300, seed: int = 0):
    """Complete randomization of m of n units on a line; four conditions as in path_enumeration.

    Returns the draws' conditions, an observed assignment, a Poisson outcome and linked pairs
    (units at most three apart, both orders, in shuffled order).
    """
    rng = np.random.default_rng(seed)
    z = np.zeros((draws, n), dtype=bool)
    np.put_along_axis(z, rng.random((draws, n)).argsort(axis=1)[:, :m], True, axis=1)
    nb = np.zeros((draws, n), dtype=int)
    nb[:, 1:] += z[:, :-1]
    nb[:, :-1] += z[:, 1:]
    conds = np.where(z, np.where(nb > 0, 1, 0), np.where(nb > 0, 2, 3))
    d = conds[0]
    y = rng.poisson(np.array([2.0, 3.0, 5.0, 4.0])[d]).astype(float)
    i, j = np.nonzero(np.abs(np.subtract.outer(np.arange(n), np.arange(n))) <= 3)
    off = i != j
    order = rng.permutation(int(off.sum()))
    return conds, d, y, (i[off][order], j[off][order])


@pytest.mark.parametrize("engine", ["numba", "numpy"])
@pytest.mark.parametrize("limit", [None, 0], ids=["all pairs", "linked pairs"])
def test_shared_estimators_equal_separate_calls(monkeypatch, engine, limit):
    # both estimators of a contrast from one visit of the pairs: to the last digit the numbers
    # of one estimate_contrast call per estimator, on the dense and the linked-pairs paths
    from geoexp.estimate import estimate_contrasts

    if limit is not None:
        monkeypatch.setattr(_horvitz, "DENSE_LIMIT", limit)
    conds, d, y, near = line_trial()
    bits = bits_of(conds, 4)
    pi = bits.probabilities()
    checked = 0
    for k in (0, 1, 2):
        both = estimate_contrasts(
            y, d, pi, k, 3, bits, labels=LABELS, near=near, engine=engine, units=pi[:, 0] < 1
        )
        assert [e.estimator for e in both] == ["hajek", "horvitz-thompson"]
        for shared in both:
            alone = estimate_contrast(
                y,
                d,
                pi,
                k,
                3,
                bits,
                labels=LABELS,
                estimator=shared.estimator,
                near=near,
                units=pi[:, 0] < 1,
            )
            assert shared == alone
            assert ("linked" in shared.joint) == (limit == 0)
            checked += shared.std_error > 0
    assert checked == 6


def test_shared_estimators_match_the_textbook_variance(monkeypatch):
    # [A] Aronow & Samii (2017) conservative variance written out pair by pair: with every pair
    # linked, the shared linked-pairs sums give it for the raw outcome (Horvitz-Thompson) and
    # for the residuals from each condition's Hajek mean (the linearized Hajek variance)
    from geoexp.estimate import estimate_contrasts

    conds, po = path_enumeration()
    bits = bits_of(conds, 4)
    pi = bits.probabilities()
    indicator = np.stack([(conds == c) for c in range(4)]).astype(float)

    def joint(p, q):
        return indicator[p].T @ indicator[q] / conds.shape[0]

    a, b = np.array([(i, j) for i in range(6) for j in range(6) if i != j]).T
    monkeypatch.setattr(_horvitz, "DENSE_LIMIT", 0)
    for d in conds:
        y = po[np.arange(6), d]
        hajek, ht = estimate_contrasts(y, d, pi, 0, 3, bits, labels=LABELS, near=(a, b))
        assert ht.std_error**2 == pytest.approx(textbook_variance(0, 3, y, d, pi, joint), rel=1e-10)
        # residuals from each condition's Hajek mean, zero outside the two conditions
        resid = np.where(
            d == 0, y - hajek.mean_exposure, np.where(d == 3, y - hajek.mean_reference, 0.0)
        )
        assert hajek.std_error**2 == pytest.approx(
            textbook_variance(0, 3, resid, d, pi, joint), rel=1e-10, abs=1e-12
        )


@pytest.mark.parametrize("limit", [None, 0], ids=["all pairs", "linked pairs"])
def test_variance_columns_equal_one_call_per_column(monkeypatch, limit):
    # several outcome vectors at once: each column's terms are the floats of a call with it alone;
    # pairs given as positions of all units with a map give those of the pairs restricted first
    if limit is not None:
        monkeypatch.setattr(_horvitz, "DENSE_LIMIT", limit)
    conds, d, y, (a, b) = line_trial(seed=3)
    bits = bits_of(conds, 4)
    pi = bits.probabilities()
    pop = np.flatnonzero((pi[:, 1] > 0) & (pi[:, 3] > 0) & (np.arange(y.size) % 5 != 2))
    where = np.full(y.size, -1)
    where[pop] = np.arange(pop.size)
    inside = (where[a] >= 0) & (where[b] >= 0)
    restricted = (where[a[inside]], where[b[inside]])
    ys = np.column_stack([y[pop], y[pop] - 3.5, np.sqrt(y[pop])])
    args = (d[pop], 1, 3, pi[pop, 1], pi[pop, 3], bits, pop)
    vk, vl, cov, joint = _horvitz.variance_terms(ys, *args, (a, b), near_map=where, columns=True)
    assert vk.shape == vl.shape == cov.shape == (3,)
    for c in range(3):
        one = _horvitz.variance_terms(ys[:, c], *args, restricted)
        assert one == (vk[c], vl[c], cov[c], joint)


def test_pair_terms_engines_and_threads_agree_exactly():
    # the numba kernel and its numpy twin give the same numbers, on one thread or several,
    # for pairs in any order, some of them outside the population, with zero joint probabilities
    from geoexp._engine import limit_threads
    from geoexp.estimate._pair_terms import pair_terms

    conds, d, y, (a, b) = line_trial(n=60, m=15, draws=130, seed=5)
    bits = bits_of(conds, 4)
    pi = bits.probabilities()
    pop = np.flatnonzero((pi[:, 0] > 0) & (pi[:, 3] > 0) & (np.arange(y.size) % 7 != 0))
    where = np.full(y.size, -1)
    where[pop] = np.arange(pop.size)
    code = np.select([d[pop] == 0, d[pop] == 3], [0, 1], 2)
    ys = np.stack([y[pop], y[pop] - y[pop].mean()])
    args = (a, b, where, code, pop, bits.bits[0], bits.bits[3], pi[pop, 0], pi[pop, 3], ys, 130)
    numpy = pair_terms(*args, engine="numpy", block=97)
    with limit_threads(1):
        one = pair_terms(*args, engine="numba")
    for result in (pair_terms(*args, engine="numba"), one):
        for name in ("kk", "ll", "kl", "zero_k", "zero_l", "zero_kl_first", "zero_kl_second"):
            np.testing.assert_array_equal(getattr(result, name), getattr(numpy, name))
    # [A] there are zero joint probabilities to count: two adjacent units are never both
    # "treated, none", nor "treated, none" beside "control, none"
    assert (
        numpy.zero_k.sum() > 0 and numpy.zero_kl_first.sum() > 0 and numpy.zero_kl_second.sum() > 0
    )
    assert numpy.kk.shape[0] == 2 and numpy.kk.shape[1] > 0 and numpy.kl.shape[1] > 0
