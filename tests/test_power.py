"""Power by simulation: outcome models, the engine, design comparison, sample sizes, the command."""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import shapely
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import nbinom
from statsmodels.stats.power import NormalIndPower, TTestIndPower

from geoexp._rng import Stream, child_sequence
from geoexp.design import Design, DesignSpec
from geoexp.errors import InputError
from geoexp.exposure import assign_conditions, condition_bits
from geoexp.inference import default_focal_units
from geoexp.power import (
    NegativeBinomialOutcome,
    NormalOutcome,
    compare_designs,
    negative_binomial_sample_size,
    simulate_power,
)
from geoexp.power._simulate import _simulate
from geoexp.units import UnitSet


def toy_design(
    side: int,
    spacing: float,
    *,
    treated: int,
    top_k: int | None = None,
    seed: int = 7,
    bands: tuple[float, ...] = (150.0,),
) -> Design:
    """Small squares on a grid; with spacing far beyond the bands there are no pairs at all."""
    rng = np.random.default_rng(seed)
    xy = [(i * spacing, j * spacing) for i in range(side) for j in range(side)]
    frame = gpd.GeoDataFrame(
        {
            "uid": np.arange(len(xy)),
            "score": rng.permutation(len(xy)).astype(float),
            "past": rng.poisson(3.0, len(xy)).astype(float),
        },
        geometry=[shapely.box(x, y, x + 10, y + 10) for x, y in xy],
        crs=32633,
    )
    data = {
        "name": "toy",
        "seed": seed,
        "draws": 1000,
        "units": {"path": "toy.gpkg", "id_column": "uid"},
        "assignment": {"method": "complete", "treated": treated},
        "exposure": {"bands_m": list(bands)},
    }
    if top_k is not None:
        data["eligible"] = {"top_column": "score", "top_k": top_k}
    spec = DesignSpec.from_dict(data, source="toy spec")
    return Design.from_spec(spec, units=UnitSet.from_frame(frame, "uid", source="toy layer"))


@pytest.fixture(scope="module")
def isolated():
    """64 units 5 km apart, 40 treated by complete randomization: no interference at all."""
    return toy_design(8, 5000.0, treated=40)


@pytest.fixture(scope="module")
def lattice():
    """A 12 x 12 grid 100 m apart, 40 eligible, 10 treated: spillover into a 150 m band."""
    return toy_design(12, 100.0, treated=10, top_k=40)


# --- closed-form sample size ----------------------------------------------------------


def test_zhu_lakkis_worked_example():
    # [A]/[M] Zhu & Lakkis (2014) per-arm sample size: mu0 = 10, RR = 0.8, alpha = 0.5
    # -> 194 per arm  # from memory
    assert negative_binomial_sample_size(10, 0.8, 0.5) == 194
    # [A] the formula: a weaker effect (RR nearer 1) and more dispersion need more units
    assert negative_binomial_sample_size(10, 0.9, 0.5) > 194
    assert negative_binomial_sample_size(10, 0.8, 1.0) > 194
    with pytest.raises(InputError):
        negative_binomial_sample_size(10, 1.0, 0.5)


# --- outcome models -------------------------------------------------------------------


def test_negative_binomial_model_has_the_nb2_mean_and_variance():
    mu, alpha, n = 3.0, 0.5, 200_000
    ref = nbinom(n=1 / alpha, p=1 / (1 + alpha * mu))
    # [L] NB2 parametrisation: scipy.stats.nbinom(n=1/a, p=1/(1+a mu)) has mean mu and
    # variance mu + a mu^2 (NB2)
    assert ref.mean() == pytest.approx(mu)
    assert ref.var() == pytest.approx(mu + alpha * mu**2)
    model = NegativeBinomialOutcome(np.full(4, mu), alpha)
    x = model.sample(np.full(n, mu), np.random.default_rng(1))
    var = ref.var()
    kurt = float(ref.stats(moments="k"))
    # [A] standard errors of a sample mean and a sample variance: sqrt(var / n) and
    # var * sqrt((excess kurtosis + 2) / n)
    assert abs(x.mean() - mu) < 4 * np.sqrt(var / n)
    assert abs(x.var(ddof=1) - var) < 4 * var * np.sqrt((kurt + 2) / n)


def test_baseline_column_is_smoothed_halfway_to_the_mean(isolated):
    past = isolated.units.frame["past"].to_numpy(dtype=float)
    got = NegativeBinomialOutcome("past", 0.5).unit_means(isolated)
    # [A] the documented smoothing (count + mean) / 2: zero counts become positive rates
    np.testing.assert_allclose(got, (past + past.mean()) / 2)
    assert (got > 0).all()


def test_bad_models_are_refused(isolated):
    with pytest.raises(InputError, match="positive"):
        NegativeBinomialOutcome("past", 0.5, {"treated": -1.0})
    with pytest.raises(InputError, match="dispersion"):
        NegativeBinomialOutcome("past", -0.1)
    with pytest.raises(InputError, match="nosuch"):
        simulate_power(isolated, NegativeBinomialOutcome("nosuch", 0.5), n_sims=5, n_draws=5)
    with pytest.raises(InputError, match="unknown exposure condition"):
        simulate_power(isolated, NormalOutcome(0, 1, {"spillover_9": 1.0}), n_sims=5, n_draws=5)


# --- the engine -----------------------------------------------------------------------


def test_engine_statistics_equal_a_direct_hajek_computation(lattice):
    # [A] Aronow & Samii (2017): Hajek = sum(y/pi_k)/sum(1/pi_k) - sum(y/pi_l)/sum(1/pi_l) over
    # the units of each condition, recomputed here from the sampler's own draws and
    # assign_conditions, one draw at a time, against the engine's block products.
    model = NegativeBinomialOutcome("past", 0.5, {"treated": 0.7, "spillover_1": 1.2})
    n_sims, n_draws, seed = 70, 90, np.random.SeedSequence(5)
    result, details = _simulate(
        lattice,
        model,
        n_sims=n_sims,
        n_draws=n_draws,
        alpha=0.05,
        outcome="change",
        alternative="two-sided",
        n_draws_probabilities=None,
        rng=seed,
    )
    draws = lattice.sampler.draw_many(n_sims + n_draws, child_sequence(seed, 0))
    probs = details["probabilities"]
    used = details["used"]
    y = details["outcomes"]
    pc = lattice.mapping.pure_control
    for k, code in enumerate(lattice.mapping.codes[:pc]):
        rows = details[code]["rows"]
        units = used[rows]
        pk, pl = probs[units, k], probs[units, pc]
        for s in (0, 33, n_sims - 1):
            for r in (n_sims, n_sims + 41, n_sims + n_draws - 1, s):
                d = assign_conditions(lattice.graph, lattice.mapping, draws.treated(r))[units]
                ys = y[rows, s]
                a, b = d == k, d == pc
                want = (ys[a] / pk[a]).sum() / (1 / pk[a]).sum() - (ys[b] / pl[b]).sum() / (
                    1 / pl[b]
                ).sum()
                got = (
                    details[code]["observed"][s] if r == s else details[code]["null"][s, r - n_sims]
                )
                assert got == pytest.approx(want, rel=1e-9, abs=1e-9)
    # spillover is tested on never-treated focal units only (Athey, Eckles & Imbens 2018)
    spill_units = used[details["spillover_1"]["rows"]]
    assert not lattice.eligible[spill_units].any()
    assert result.contrasts[1].n_units == spill_units.size


def _two_sided_p(t: float, draws: np.ndarray) -> float:
    # [A] equal-tailed two-sided Monte Carlo p-value: min(1, 2 min((1 + #{T >= t}) / (R + 1),
    # (1 + #{T <= t}) / (R + 1))), Lehmann & Romano (2005) section 5.8, written out here
    r = draws.size
    upper = (1 + (draws >= t).sum()) / (r + 1)
    lower = (1 + (draws <= t).sum()) / (r + 1)
    return min(1.0, 2 * min(upper, lower))


def _hajek_of(values, d, k, pc, pk, pl):
    # [A] Aronow & Samii (2017) Hajek contrast over the units of each condition
    a, b = d == k, d == pc
    return (values[a] / pk[a]).sum() / (1 / pk[a]).sum() - (values[b] / pl[b]).sum() / (
        1 / pl[b]
    ).sum()


def _imputed_draws(shifted, d_s, x, reference, k, pc, pk, pl):
    # Y_i(pure control) = y_i - tau_{d_i} - x 1[d_i = k], the Hajek contrast under each draw
    imputed = shifted - x * (d_s == k)
    return np.array([_hajek_of(imputed, d, k, pc, pk, pl) for d in reference])


def test_inverted_intervals_of_the_simulated_trials(lattice):
    # [A] Rosenbaum (2002) inversion under constant additive effects: with tau_c held at the
    # trial's estimates for the other conditions (0 for the reference), each draw r imputes
    # Y_i(pure control) = y_i - tau_{d_i} - x 1[d_i = k] and recomputes the Hajek contrast; the
    # interval is the set of x whose test does not reject. Recomputed here one draw at a time
    # from the sampler's own draws and assign_conditions, against the engine's block products.
    model = NormalOutcome(0.0, 1.0, {"treated": -0.8, "spillover_1": 0.4})
    n_sims, n_draws, seed = 30, 80, np.random.SeedSequence(9)
    result, details = _simulate(
        lattice,
        model,
        n_sims=n_sims,
        n_draws=n_draws,
        alpha=0.1,
        outcome="post",
        alternative="two-sided",
        n_draws_probabilities=None,
        rng=seed,
        coverage=("treated", "spillover_1"),
    )
    draws = lattice.sampler.draw_many(n_sims + n_draws, child_sequence(seed, 0))
    probs, used, y = details["probabilities"], details["used"], details["outcomes"]
    pc = lattice.mapping.pure_control
    plug = details["plug"]
    for k, code in enumerate(lattice.mapping.codes[:pc]):
        rows = details[code]["rows"]
        units = used[rows]
        pk, pl = probs[units, k], probs[units, pc]
        reference = np.array(
            [
                assign_conditions(lattice.graph, lattice.mapping, draws.treated(r))[units]
                for r in range(n_sims, n_sims + n_draws)
            ]
        )
        for s in (0, 17, n_sims - 1):
            d_s = assign_conditions(lattice.graph, lattice.mapping, draws.treated(s))[units]
            # the plugged effect of this row is the trial's own Hajek estimate over its units
            own = _hajek_of(y[rows, s], d_s, k, pc, pk, pl)
            assert plug[k, s] == pytest.approx(own, rel=1e-9, abs=1e-12)
            tau = plug[:, s].copy()
            tau[[k, pc]] = 0.0
            shifted = y[rows, s] - tau[d_s]
            for x in (-1.0, 0.3):
                got = details[code]["u"][s] - x * details[code]["v"][s]
                want = _imputed_draws(shifted, d_s, x, reference, k, pc, pk, pl)
                np.testing.assert_allclose(got, want, rtol=1e-9, atol=1e-9)
            est = details[code]["observed"][s]
            low, high = details[code]["low"][s], details[code]["high"][s]
            assert low < est < high
            # the ends are where the test starts to reject at alpha = 0.1
            step = 1e-6 * (high - low)
            for inner, out in ((low + step, low - step), (high - step, high + step)):
                at_in = _imputed_draws(shifted, d_s, inner, reference, k, pc, pk, pl)
                at_out = _imputed_draws(shifted, d_s, out, reference, k, pc, pk, pl)
                assert _two_sided_p(est - inner, at_in) > 0.1
                assert _two_sided_p(est - out, at_out) <= 0.1
        contrast = result.contrasts[k]
        inside = (details[code]["low"] <= contrast.planted_effect) & (
            contrast.planted_effect <= details[code]["high"]
        )
        assert contrast.n_covered == inside.sum()
        assert contrast.coverage == inside.mean()


def test_inverted_intervals_cover_a_constant_effect_at_their_level(isolated):
    # [A] Rosenbaum (2002): inverting an exact randomization test gives an interval whose
    # coverage of a constant additive effect is at least its level; with the equal-tailed
    # Monte Carlo p-value (1 + M) / (R + 1) it is a little above. No interference here, so the
    # model of the test is the model that made the data. Allowance: 3 Monte Carlo errors below,
    # and 3 plus 0.02 above (the conservative p-value rule on 200 draws).
    model = NormalOutcome(0.0, 1.0, {"treated": 0.7})
    result = simulate_power(
        isolated, model, n_sims=400, n_draws=200, outcome="post", rng=21, coverage=("treated",)
    )
    row = result.contrasts[0]
    assert row.planted_effect == pytest.approx(0.7)
    mc = np.sqrt(0.95 * 0.05 / 400)
    assert 0.95 - 3 * mc <= row.coverage <= 0.95 + 3 * mc + 0.02
    assert row.coverage_mc_error == pytest.approx(np.sqrt(row.coverage * (1 - row.coverage) / 400))
    # a value other than the planted effect (0, no effect) is covered far less often
    _, details = _simulate(
        isolated,
        model,
        n_sims=200,
        n_draws=200,
        alpha=0.05,
        outcome="post",
        alternative="two-sided",
        n_draws_probabilities=None,
        rng=21,
        coverage=("treated",),
    )
    low, high = details["treated"]["low"], details["treated"]["high"]
    assert ((low <= 0.0) & (0.0 <= high)).mean() < 0.5
    # without asking, no coverage and the same power
    plain = simulate_power(isolated, model, n_sims=400, n_draws=200, outcome="post", rng=21)
    assert np.isnan(plain.contrasts[0].coverage)
    assert plain.contrasts[0].power == row.power


def test_probabilities_given_are_those_computed(lattice):
    model = NegativeBinomialOutcome("past", 0.5, {"treated": 0.7})
    given_p = lattice.probabilities().probabilities
    a = simulate_power(lattice, model, n_sims=20, n_draws=30, rng=3).to_frame()
    b = simulate_power(lattice, model, n_sims=20, n_draws=30, rng=3, probabilities=given_p)
    pd.testing.assert_frame_equal(a, b.to_frame())
    with pytest.raises(InputError, match="probabilities must be"):
        simulate_power(lattice, model, n_sims=2, n_draws=2, probabilities=given_p[:3])
    with pytest.raises(InputError, match="coverage names"):
        simulate_power(lattice, model, n_sims=2, n_draws=2, coverage=("spillover_7",))


def test_probabilities_are_the_designs_own(lattice):
    _, details = _simulate(
        lattice,
        NormalOutcome(),
        n_sims=10,
        n_draws=10,
        alpha=0.05,
        outcome="post",
        alternative="two-sided",
        n_draws_probabilities=None,
        rng=1,
    )
    # the analysis computes them this way (geoexp.analysis._run): the spec's draws, stream 1
    again = condition_bits(
        lattice.sampler,
        lattice.graph,
        lattice.mapping,
        lattice.spec.draws,
        lattice.stream(Stream.MONTE_CARLO),
    ).probabilities()
    np.testing.assert_array_equal(details["probabilities"], again)
    # [A] complete randomization of 10 of 40 eligible units: sum_i pi_i(treated) = 10 per draw
    assert details["probabilities"][:, 0].sum() == pytest.approx(10)


def test_power_of_the_randomization_test_matches_the_normal_approximation(isolated):
    # [L] statsmodels NormalIndPower: no interference (no pairs), complete randomization of 40 of
    # 64, normal outcomes: power of the difference in means from statsmodels NormalIndPower.
    # Allowance 0.03 on top of 3 MC errors: the randomization test behaves like the t-test,
    # whose power (statsmodels TTestIndPower) is about 0.01 below the normal one here, and its
    # p-values on 500 draws are slightly conservative.
    d, n1, n_sims = 0.5, 40, 1000
    n0 = isolated.units.n - n1
    result = simulate_power(
        isolated,
        NormalOutcome(0.0, 1.0, {"treated": d}),
        n_sims=n_sims,
        n_draws=500,
        outcome="post",
        rng=11,
    )
    direct = result.contrasts[0]
    z_power = NormalIndPower().power(effect_size=d, nobs1=n1, ratio=n0 / n1, alpha=0.05)
    t_power = TTestIndPower().power(effect_size=d, nobs1=n1, ratio=n0 / n1, alpha=0.05)
    assert t_power < z_power < t_power + 0.02
    assert abs(direct.power - z_power) <= 3 * direct.mc_error + 0.03
    assert direct.n_units == isolated.units.n == 64
    # [A] an additive shift: the planted effect on the estimand is the shift itself
    assert direct.planted_effect == pytest.approx(d)
    # no pairs: no unit can be in the band, so there is no spillover test (and it says so)
    assert np.isnan(result.contrasts[1].power)
    assert any("no test" in n for n in result.notes)


def test_size_without_effect_is_alpha(isolated):
    # Fisher randomization test (Athey, Eckles & Imbens 2018): under a true null the rejection
    # rate is alpha within a few MC errors
    result = simulate_power(
        isolated, NegativeBinomialOutcome("past", 0.5), n_sims=1000, n_draws=400, rng=3
    )
    direct = result.contrasts[0]
    se = np.sqrt(0.05 * 0.95 / 1000)
    assert abs(direct.power - 0.05) <= 3 * se
    assert "size" in direct.sentence


def test_spillover_test_size_and_power_on_a_lattice(lattice):
    # Athey, Eckles & Imbens (2018) conditional test: size within 3 MC errors of alpha under no
    # effect at all; a strong
    # displacement into the band is detected more often than alpha
    null = simulate_power(
        lattice, NegativeBinomialOutcome("past", 0.3), n_sims=600, n_draws=300, rng=8
    )
    se = np.sqrt(0.05 * 0.95 / 600)
    assert all(abs(c.power - 0.05) <= 3 * se for c in null.contrasts)
    strong = simulate_power(
        lattice,
        NegativeBinomialOutcome("past", 0.3, {"spillover_1": 2.0}),
        n_sims=200,
        n_draws=300,
        rng=8,
    )
    assert strong.contrasts[1].power > 0.05 + 3 * strong.contrasts[1].mc_error
    # [A] counts, outcome "change": planted = mean over the focal units of mu_i (RR - 1)
    mu = NegativeBinomialOutcome("past", 0.3).unit_means(lattice)
    probs = condition_bits(
        lattice.sampler,
        lattice.graph,
        lattice.mapping,
        lattice.spec.draws,
        lattice.stream(Stream.MONTE_CARLO),
    ).probabilities()
    focal = default_focal_units(lattice, probs, 1)
    assert strong.contrasts[1].n_units == focal.size
    assert strong.contrasts[1].planted_effect == pytest.approx(mu[focal].mean() * (2.0 - 1.0))
    assert strong.contrasts[0].planted_effect == pytest.approx(0.0)


@settings(max_examples=12, deadline=None)
@given(
    small=st.floats(0.0, 0.8, allow_nan=False),
    extra=st.floats(0.05, 1.0, allow_nan=False),
)
def test_stronger_effects_never_lose_power(isolated, small, extra):
    # [A] with the same seed the draws and the noise are the same; a shift d on the treated
    # units adds d to the observed Hajek contrast and d * c_r to reference draw r, where
    # c_r (a contrast of 0/1 values) is at most 1, so one-sided rejections only grow with d
    common = dict(n_sims=150, n_draws=150, outcome="post", alternative="greater", rng=21)
    weak = simulate_power(isolated, NormalOutcome(0, 1, {"treated": small}), **common)
    strong = simulate_power(isolated, NormalOutcome(0, 1, {"treated": small + extra}), **common)
    assert strong.contrasts[0].n_rejected >= weak.contrasts[0].n_rejected


def test_same_seed_same_result_and_comparison_side_by_side(lattice, isolated):
    model = NegativeBinomialOutcome("past", 0.5, {"treated": 0.6})
    one = simulate_power(lattice, model, n_sims=60, n_draws=60, rng=4)
    two = simulate_power(lattice, model, n_sims=60, n_draws=60, rng=4)
    pd.testing.assert_frame_equal(one.to_frame(), two.to_frame())
    table = compare_designs(
        {"grid": lattice, "apart": isolated}, model, n_sims=60, n_draws=60, rng=4
    )
    assert set(table.columns.get_level_values(0)) == {"grid", "apart"}
    # the comparison runs each design exactly as simulate_power does with the same seed
    np.testing.assert_array_equal(table[("grid", "power")].to_numpy(), one.to_frame()["power"])
    assert "would be detected" in str(one)


def test_comparison_keeps_bands_of_different_distances_apart(lattice):
    wide = toy_design(12, 100.0, treated=10, top_k=40, bands=(250.0,))
    model = NegativeBinomialOutcome("past", 0.5, {"treated": 0.6})
    table = compare_designs({"150 m": lattice, "250 m": wide}, model, n_sims=20, n_draws=20, rng=4)
    rows = list(table.index)
    assert "spillover 0-150 m vs pure control" in rows
    assert "spillover 0-250 m vs pure control" in rows
    # a band row holds values only for the design that has that band
    assert np.isnan(table.loc["spillover 0-150 m vs pure control", ("250 m", "power")])
    assert np.isnan(table.loc["spillover 0-250 m vs pure control", ("150 m", "power")])
    # the treated row is the same contrast in both designs
    assert np.isfinite(table.loc["treated vs pure control", ("250 m", "power")])


def test_power_command_on_the_demo_spec(demo_outputs):
    from typer.testing import CliRunner

    import geoexp.cli._power_commands  # noqa: F401  (registers the command)
    from geoexp.cli._app import app

    spec = str(demo_outputs["spec"])
    args = ["power", spec, "--rate-ratio", "treated=0.8", "--rate-ratio", "spillover_1=0.95"]
    args += ["--baseline-column", "incidents_y1", "--dispersion", "0.5"]
    args += ["--sims", "40", "--draws", "99", "--alternative-spec", spec]
    result = CliRunner().invoke(app, args)
    assert result.exit_code == 0, result.output
    assert "a 20% reduction on treated units would be detected in about" in result.output
    assert "Designs compared" in result.output
    bad = CliRunner().invoke(app, ["power", spec, "--rate-ratio", "treated"])
    assert bad.exit_code != 0


def test_power_simulates_the_analysis_rows_units(lattice):
    # the power module and the analysis define each contrast over the same units
    from geoexp.estimate import DEFAULT_FLOOR, contrast_units

    result, details = _simulate(
        lattice,
        NormalOutcome(),
        n_sims=10,
        n_draws=10,
        alpha=0.05,
        outcome="post",
        alternative="two-sided",
        n_draws_probabilities=None,
        rng=1,
    )
    probs = details["probabilities"]
    pc = lattice.mapping.pure_control
    for k, group in ((0, "eligible"), (1, "never-eligible")):
        est = contrast_units(
            probs,
            lattice.eligible,
            k,
            pc,
            labels=lattice.mapping.labels,
            group=group,
            floor=DEFAULT_FLOOR,
        )
        rows = details[lattice.mapping.codes[k]]["rows"]
        np.testing.assert_array_equal(details["used"][rows], np.flatnonzero(est.units))
        assert result.contrasts[k].n_units == est.n_units


def test_outcomes_do_not_depend_on_the_number_of_threads(lattice, monkeypatch):
    from geoexp._engine import limit_threads
    from geoexp.power import _simulate as engine

    # blocks of 16 units, so that the 144 units of the lattice make several blocks and threads
    monkeypatch.setattr(engine, "_OUTCOME_BLOCK", 16)
    model = NegativeBinomialOutcome("past", 0.5, {"treated": 0.7})
    common = dict(
        n_sims=12,
        n_draws=20,
        alpha=0.05,
        outcome="change",
        alternative="two-sided",
        n_draws_probabilities=None,
        rng=8,
    )
    _, many = _simulate(lattice, model, **common)
    with limit_threads(1):
        _, one = _simulate(lattice, model, **common)
    np.testing.assert_array_equal(many["outcomes"], one["outcomes"])
    # the reference draws' sums, block products added in block order, are the same too
    monkeypatch.setattr(engine, "_MIN_BLOCK_UNITS", 8)
    _, many = _simulate(lattice, model, coverage=("treated",), **common)
    with limit_threads(1):
        _, one = _simulate(lattice, model, coverage=("treated",), **common)
    assert many["treated"]["rows"].size > 3 * 8  # several blocks
    for key in ("null", "u", "v", "low", "high"):
        np.testing.assert_array_equal(many["treated"][key], one["treated"][key])
    # [A] the blocks are independent streams: no two blocks repeat each other's draws
    y = one["outcomes"]
    assert not any(np.array_equal(y[0:16], y[b : b + 16]) for b in range(16, y.shape[0] - 15, 16))
