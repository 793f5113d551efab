"""Design sweeps: the spec, candidate seeds, evaluation, ranking, figure, command and cluster."""

from __future__ import annotations

import hashlib
import json
import struct

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import shapely
from scipy.stats import norm
from typer.testing import CliRunner

from geoexp._rng import Stream
from geoexp.cli import app
from geoexp.design import Design
from geoexp.errors import DesignError
from geoexp.power import NegativeBinomialOutcome, simulate_power
from geoexp.sweep import (
    Candidate,
    DaskBackend,
    SweepSpec,
    apply_to_shared,
    candidate_seed,
    chunk_sizes,
    evaluate_candidate,
    minimum_detectable_effect,
    pooled_mean_sd,
    rank_table,
    run_sweep,
)

BASE_TOML = """
name = "toy patrols"
seed = 11
draws = 400

[units]
path = "toy.gpkg"
id_column = "uid"

[eligible]
top_column = "score"
top_k = 40

[assignment]
method = "complete"
treated = 10

[exposure]
bands_m = [150.0]
"""

SWEEP = {
    "name": "toy sweep",
    "design": "design.toml",
    "seed": 5,
    "rank_by": "power",
    "grid": {"treated": [6, 12], "gap_m": [0, 150]},
    "effects": {"treated": 0.5, "spillover_1": 0.9},
    "simulation": {"sims": 40, "draws": 99, "baseline_column": "past", "dispersion": 0.2},
}


def _toml(data: dict) -> str:
    import tomli_w

    return tomli_w.dumps(data)


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    """A 12 x 12 grid of small squares 100 m apart, its base design and a sweep file."""
    out = tmp_path_factory.mktemp("sweep")
    rng = np.random.default_rng(3)
    xy = [(i * 100.0, j * 100.0) for i in range(12) for j in range(12)]
    gpd.GeoDataFrame(
        {
            "uid": np.arange(len(xy)),
            "score": rng.permutation(len(xy)).astype(float),
            "past": rng.poisson(6.0, len(xy)).astype(float),
        },
        geometry=[shapely.box(x, y, x + 10, y + 10) for x, y in xy],
        crs=32633,
    ).to_file(out / "toy.gpkg", driver="GPKG")
    (out / "design.toml").write_text(BASE_TOML, encoding="utf-8")
    (out / "sweep.toml").write_text(_toml(SWEEP), encoding="utf-8")
    return out


@pytest.fixture(scope="module")
def spec(folder):
    return SweepSpec.from_toml(folder / "sweep.toml")


@pytest.fixture(scope="module")
def result(spec):
    return run_sweep(spec)


def _rows(table: pd.DataFrame) -> pd.DataFrame:
    """The table without its timing column and order, for comparisons of results."""
    return table.drop(columns=["seconds", "rank"]).sort_index()


# --- candidate seeds ------------------------------------------------------------------


def test_candidate_seed_is_the_hash_of_the_values_alone():
    values = {"treated": 40, "gap_m": 150, "bands_m": [150, 300], "method": "complete"}
    seq = candidate_seed(7, values)
    # independent reference: SHA-256 (hashlib) of the canonical JSON, first 16 bytes as four
    # little-endian 32-bit words after the sweep's seed
    text = json.dumps(
        {"bands_m": [150.0, 300.0], "gap_m": 150.0, "method": "complete", "treated": 40},
        sort_keys=True,
        separators=(",", ":"),
    )
    words = struct.unpack("<4I", hashlib.sha256(text.encode()).digest()[:16])
    assert seq.entropy == [7, *words]
    # the order of the keys and the way a number is written do not matter ...
    reordered = {"method": "complete", "bands_m": (150.0, 300), "gap_m": 150.0, "treated": 40}
    assert candidate_seed(7, reordered).entropy == seq.entropy
    # ... the sweep's seed and every value do
    assert candidate_seed(8, values).entropy != seq.entropy
    assert candidate_seed(7, {**values, "gap_m": 151}).entropy != seq.entropy
    a = Candidate.from_values(values, 7)
    assert 0 <= a.design_seed < 2**63
    assert a.design_seed == Candidate.from_values(reordered, 7).design_seed


def test_each_candidate_gets_its_own_design_spec(spec):
    candidates = spec.candidates()
    assert [c.label for c in candidates] == [
        "treated=6, gap_m=0",
        "treated=6, gap_m=150",
        "treated=12, gap_m=0",
        "treated=12, gap_m=150",
    ]
    specs = [spec.design_spec(c) for c in candidates]
    assert len({s.seed for s in specs}) == len(specs)
    assert specs[0].assignment.gap_m is None and specs[1].assignment.gap_m == 150.0
    assert specs[3].assignment.treated == 12
    assert specs[0].units == spec.base.units and specs[0].eligible == spec.base.eligible


# --- the spec's checks ---------------------------------------------------------------


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({"grid": {"treated": [6, 12.5]}}, r"\[grid\] treated\[1\] must be a number of units"),
        ({"grid": {"treated": [True]}}, r"\[grid\] treated\[0\].*true/false"),
        ({"grid": {"treated": []}}, r"\[grid\] treated must be a non-empty list"),
        ({"grid": {"treated": [6, 6]}}, r"\[grid\] treated lists a value twice"),
        ({"grid": {"gap_m": [-5]}}, r"\[grid\] gap_m\[0\] must be a distance"),
        ({"grid": {"bands_m": [[300, 150]]}}, r"bands_m must be increasing"),
        ({"grid": {"method": ["lottery"]}}, r"\[grid\] method\[0\] must be one of"),
        ({"grid": {"colour": ["red"]}}, r"unknown key\(s\) \['colour'\] in \[grid\]"),
        ({"effects": {"spillover_2": 0.9}}, r"unknown condition\(s\) \['spillover_2'\]"),
        ({"effects": {"treated": 0}}, r"\[effects\] treated must be a rate ratio"),
        ({"simulation": {"sims": "many"}}, r"\[simulation\] sims must be"),
        ({"rank_by": "luck"}, r"rank_by must be one of"),
        ({"rank_contrast": "spillover_3"}, r"rank_contrast must be one of"),
        ({"extra": 1}, r"unknown key\(s\) \['extra'\]"),
    ],
)
def test_sweep_spec_refuses_bad_keys_naming_them(folder, change, message):
    data = {**SWEEP, **change}
    with pytest.raises(DesignError, match=message):
        SweepSpec.from_dict(data, base_dir=folder, source="sweep.toml")


def test_an_impossible_candidate_fails_before_any_work(folder):
    # a candidate treating more units than are eligible is refused when the spec is read
    data = {**SWEEP, "grid": {"treated": [6, 500_000_000]}}
    with pytest.raises(DesignError, match="treated"):
        SweepSpec.from_dict(data, base_dir=folder, source="sweep.toml")


# --- evaluation and ranking -----------------------------------------------------------


def test_expected_units_add_up(result):
    table = result.table
    conditions = [c for c in table.columns if c.startswith("expected_")]
    # [A] sum_k pi_i(k) = 1 for every unit, so the expected units add up to the layer's 144
    assert np.allclose(table[conditions].sum(axis=1), 144)
    # [A] sum_i pi_i(treated) = m for designs that fix the number treated
    assert np.allclose(table["expected_treated"], table["treated"].astype(float))
    assert table["feasible"].all()


def test_a_row_is_the_power_simulation_of_its_own_design_spec(spec, result):
    # the candidate alone (its own spec, its own narrower graph, nothing else of the sweep)
    # gives the very numbers of its row
    candidate = spec.candidates()[3]
    design = Design.from_spec(spec.design_spec(candidate))
    model = NegativeBinomialOutcome("past", 0.2, {"treated": 0.5, "spillover_1": 0.9})
    alone = simulate_power(
        design, model, n_sims=40, n_draws=99, coverage=("treated", "spillover_1")
    ).to_frame()
    row = result.table.loc[candidate.label]
    for code in ("treated", "spillover_1"):
        assert row[f"power_{code}"] == alone.loc[code, "power"]
        assert row[f"coverage_{code}"] == alone.loc[code, "coverage"]
        c = row[f"coverage_{code}"]
        # [A] binomial standard error of a share of 40 trials
        assert row[f"coverage_mc_error_{code}"] == pytest.approx(np.sqrt(c * (1 - c) / 40))
        assert (
            row[f"bias_{code}"]
            == alone.loc[code, "mean_estimate"] - alone.loc[code, "planted_effect"]
        )


def test_rows_do_not_depend_on_the_order_of_the_grid(folder, result):
    reversed_grid = {**SWEEP, "grid": {"treated": [12, 6], "gap_m": [150, 0]}}
    again = run_sweep(SweepSpec.from_dict(reversed_grid, base_dir=folder))
    pd.testing.assert_frame_equal(_rows(again.table), _rows(result.table), check_exact=True)


def test_ranking_follows_what_the_planner_asked(result):
    table = result.table
    assert table["rank"].tolist() == list(range(1, len(table) + 1))
    power = table["power_treated"].to_numpy()
    assert (np.diff(power) <= 0).all()  # highest power first
    by_mde = rank_table(table.drop(columns="rank"), "mde", "treated", 0.8)
    assert (np.diff(by_mde["mde_treated"].abs().to_numpy()) >= 0).all()
    target = float(np.median(power))
    by_cost = rank_table(table.drop(columns="rank"), "cost", "treated", target)
    reach = (by_cost["power_treated"] >= target).to_numpy()
    # every candidate reaching the target comes before every one that does not, cheapest first
    assert not (np.diff(reach.astype(int)) > 0).any()
    assert (np.diff(by_cost["expected_treated"].to_numpy()[reach]) >= 0).all()


def test_minimum_detectable_effect_multiplier():
    # Bloom (1995): the MDE of a two-sided 5% test with 80% power is about 2.8 standard
    # errors  # from memory; exactly z_0.975 + z_0.8 (scipy.stats.norm)
    assert minimum_detectable_effect(1.0, 0.05, 0.8) == pytest.approx(2.8, abs=0.005)
    assert minimum_detectable_effect(2.0, 0.05, 0.8) == pytest.approx(
        2 * (norm.ppf(0.975) + norm.ppf(0.8)), rel=1e-12
    )
    one_sided = minimum_detectable_effect(1.0, 0.05, 0.8, "greater")
    assert one_sided == pytest.approx(norm.ppf(0.95) + norm.ppf(0.8), rel=1e-12)


def test_printed_table_and_figure(result, tmp_path):
    text = str(result)
    assert "power" in text and "MDE (incidents/unit)" in text and "treated (units)" in text
    assert "does not replace" in text  # the caution travels with every output
    ax = result.plot()
    assert len(ax.lines) >= 2  # one line per gap, plus the target
    assert ax.get_xlabel().startswith("treated units")
    written = pd.read_csv(result.to_csv(tmp_path / "t.csv"), index_col="candidate")
    assert list(written.index) == list(result.table.index)


def test_infeasible_candidates_are_reported_not_fatal(folder):
    # 40 eligible units on a 100 m lattice cannot hold 30 treated units 250 m apart
    data = {**SWEEP, "grid": {"treated": [6, 30], "gap_m": [250]}}
    table = run_sweep(SweepSpec.from_dict(data, base_dir=folder)).table
    bad = table.loc["treated=30, gap_m=250"]
    assert not bad["feasible"] and "infeasible" in bad["notes"]
    assert table.loc["treated=6, gap_m=250", "feasible"]
    assert table["rank"].iloc[-1] == len(table) and table.index[-1] == "treated=30, gap_m=250"


def test_sweep_command_writes_table_and_figure(folder, tmp_path):
    out, figure = tmp_path / "sweep.csv", tmp_path / "sweep.png"
    done = CliRunner().invoke(
        app,
        ["sweep", str(folder / "sweep.toml"), "--out", str(out), "--figure", str(figure)],
    )
    assert done.exit_code == 0, done.output
    assert "Ranked by power" in done.output
    assert len(pd.read_csv(out)) == 4
    assert figure.stat().st_size > 1000
    refused = CliRunner().invoke(
        app, ["sweep", str(folder / "sweep.toml"), "--out", str(folder / "toy.gpkg")]
    )
    assert refused.exit_code == 2


# --- one large design in chunks -------------------------------------------------------


def test_pooled_mean_and_sd_equal_those_of_the_pooled_values():
    rng = np.random.default_rng(9)
    groups = [rng.normal(3, 2, size=n) for n in (5, 1, 12, 0, 7)]
    counts = [g.size for g in groups]
    means = [g.mean() if g.size else np.nan for g in groups]
    sds = [g.std(ddof=1) if g.size > 1 else np.nan for g in groups]
    mean, sd = pooled_mean_sd(counts, means, sds)
    every = np.concatenate(groups)
    # [A] numpy on the pooled values themselves
    assert mean == pytest.approx(every.mean(), rel=1e-12)
    assert sd == pytest.approx(every.std(ddof=1), rel=1e-12)


def test_chunks_of_one_design_pool_to_their_own_simulations(folder):
    data = {**SWEEP, "grid": {"treated": [12]}}
    data["simulation"] = {**SWEEP["simulation"], "sims": 50, "chunk_sims": 20}
    chunked = SweepSpec.from_dict(data, base_dir=folder)
    assert chunk_sizes(chunked.simulation) == [20, 20, 10]
    row = run_sweep(chunked).table.iloc[0]
    # each chunk is simulate_power on the design's power stream with index chunk + 1
    candidate_spec = chunked.design_spec(chunked.candidates()[0])
    design = Design.from_spec(candidate_spec)
    model = NegativeBinomialOutcome("past", 0.2, {"treated": 0.5, "spillover_1": 0.9})
    frames = [
        simulate_power(
            design,
            model,
            n_sims=n,
            n_draws=99,
            rng=design.stream(Stream.POWER, c + 1),
            coverage=("treated",),
        ).to_frame()
        for c, n in enumerate([20, 20, 10])
    ]
    rejected = sum(f.loc["treated", "n_rejected"] for f in frames)
    assert row["power_treated"] == rejected / 50
    # coverage pools the covering trials of every chunk
    assert row["coverage_treated"] == sum(f.loc["treated", "n_covered"] for f in frames) / 50
    # the same chunks run one after the other in one call give the same row
    alone = evaluate_candidate(
        candidate_spec, _layer_of(chunked), chunked.simulation, dict(chunked.effects)
    )
    for key, value in alone.items():
        if key != "seconds":
            assert row[key] == value or (pd.isna(row[key]) and pd.isna(value)), key


def _layer_of(spec: SweepSpec):
    from geoexp.sweep import SweepLayer

    return SweepLayer.for_specs(spec.base, [spec.design_spec(c) for c in spec.candidates()])


# --- the Dask back end -----------------------------------------------------------------


def test_a_cluster_of_two_worker_processes_gives_identical_results(folder, spec, capsys):
    from geoexp.inference import ContrastSpec, fisher_test

    one = {**SWEEP, "grid": {"treated": [12], "gap_m": [150]}}
    single = SweepSpec.from_dict(one, base_dir=folder)
    local = run_sweep(single)
    one["simulation"] = {**SWEEP["simulation"], "sims": 50, "chunk_sims": 20}
    chunked = SweepSpec.from_dict(one, base_dir=folder)
    chunked_local = run_sweep(chunked)
    design = Design.from_spec(single.design_spec(single.candidates()[0]))
    assignment = design.draw()
    probs = design.probabilities().probabilities
    y = np.random.default_rng(4).poisson(5.0, design.units.n).astype(float)
    contrast = ContrastSpec(0, design.mapping.pure_control, np.ones(design.units.n, bool))
    args = (assignment.conditions, y, probs, contrast)
    options = {"n_draws": 199, "keep_null": True}
    local_test = fisher_test(design, *args, **options)

    backend = DaskBackend(workers=2)
    try:
        assert "2 worker" in backend.describe()
        remote = run_sweep(single, backend=backend)
        capsys.readouterr()
        chunked_remote = run_sweep(chunked, backend=backend, progress=True)
        shown = capsys.readouterr().err
        [(_, remote_test)] = list(
            backend.run(apply_to_shared, [(fisher_test, args, options)], design)
        )
    finally:
        backend.close()
    pd.testing.assert_frame_equal(_rows(remote.table), _rows(local.table), check_exact=True)
    pd.testing.assert_frame_equal(
        _rows(chunked_remote.table), _rows(chunked_local.table), check_exact=True
    )
    # the progress bar counts the cluster's tasks as they finish: one for the probabilities and
    # one per chunk of trials (3 chunks of 50 trials at 20 a chunk)
    assert "4/4" in shown and "a local Dask cluster of 2" in shown
    assert remote_test.p_value == local_test.p_value
    assert remote_test.statistic == local_test.statistic
    np.testing.assert_array_equal(remote_test.null_draws, local_test.null_draws)
    assert np.unique(local_test.null_draws).size > 10  # a real reference distribution


def test_an_unreachable_scheduler_is_a_clear_error():
    from geoexp.errors import InputError

    # nothing listens on port 9 of this machine (the discard port, unused here)
    with pytest.raises(InputError, match="could not reach the Dask scheduler"):
        DaskBackend(scheduler="tcp://127.0.0.1:9", timeout=2)
    with pytest.raises(InputError, match="either a number of local workers or a scheduler"):
        DaskBackend(workers=2, scheduler="tcp://127.0.0.1:9")


def test_sweep_command_refuses_workers_and_scheduler_together(folder, tmp_path):
    done = CliRunner().invoke(
        app,
        [
            "sweep",
            str(folder / "sweep.toml"),
            "--out",
            str(tmp_path / "s.csv"),
            "--workers",
            "2",
            "--scheduler",
            "tcp://127.0.0.1:9",
        ],
    )
    assert done.exit_code == 2
    assert "not both" in done.output
