"""Design specs, designs resolved on the sample city, the design check and the trial file."""

from __future__ import annotations

import subprocess
import sys
import textwrap

import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely

from geoexp.design import Design, DesignSpec, check_design
from geoexp.errors import DesignError, InfeasibleDesignError, LockedTrialError
from geoexp.inference import moran as morans_i
from geoexp.trialfile import TrialFile, export_assignment_csv, write_trial


def spec_dict(region_path, **assignment):
    return {
        "name": "test trial",
        "seed": 123,
        "draws": 200,
        "units": {"path": str(region_path), "layer": "segments", "id_column": "segment_id"},
        "eligible": {"top_column": "incidents_y1", "top_k": 120},
        "assignment": {"method": "complete", "treated": 30, **assignment},
        "exposure": {"bands_m": [150, 300]},
        "field": {"district_column": "district", "description_column": "description"},
    }


@pytest.fixture(scope="module")
def units(region_path):
    from geoexp.units import UnitSet

    return UnitSet.from_file(region_path, "segment_id", layer="segments")


@pytest.fixture(scope="module")
def graph(units):
    from geoexp.graph import ExposureGraph

    return ExposureGraph.from_units(units, 300.0)


def make(region_path, units, graph, **assignment):
    spec = DesignSpec.from_dict(spec_dict(region_path, **assignment))
    return Design.from_spec(spec, units=units, graph=graph)


# ---- specs -----------------------------------------------------------------


def test_spec_toml_round_trip_and_hash(tmp_path, region_path):
    spec = DesignSpec.from_dict(spec_dict(region_path))
    path = tmp_path / "design.toml"
    spec.to_toml(path)
    again = DesignSpec.from_toml(path)
    assert again == spec
    assert again.hash == spec.hash
    assert len(spec.hash) == 64
    assert spec.replace(seed=124).hash != spec.hash
    # the hash is of the content, not of the file's layout: reorder keys and add comments
    text = path.read_text()
    path.write_text("# a comment\n" + text.replace("\n", "\n\n"))
    assert DesignSpec.from_toml(path).hash == spec.hash


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({"units": None}, r"\[units\]"),
        ({"colour": "red"}, "unknown top-level keys"),
        ({"assignment": {"method": "complete", "treated": 3, "share": 0.2}}, "exactly one"),
        ({"assignment": {"method": "lottery"}}, "method must be"),
        ({"assignment": {"method": "complete", "treatd": 3}}, "unknown key"),
        ({"assignment": {"method": "saturation", "cluster_column": "district"}}, "saturation"),
        ({"exposure": {"bands_m": [300, 150]}}, "bands_m"),
        ({"seed": -1}, "seed"),
        ({"eligible": {"top_k": 10}}, "top_column"),
    ],
)
def test_spec_errors_say_what_is_wrong(region_path, change, message):
    data = spec_dict(region_path)
    for key, value in change.items():
        if value is None:
            data.pop(key)
        else:
            data[key] = value
    with pytest.raises(DesignError, match=message):
        DesignSpec.from_dict(data)


def test_missing_spec_file_is_named(tmp_path):
    with pytest.raises(DesignError, match="nothere.toml"):
        DesignSpec.from_toml(tmp_path / "nothere.toml")


# ---- designs ---------------------------------------------------------------


def test_same_seed_same_assignment_different_seed_different(region_path, units, graph):
    design = make(region_path, units, graph)
    a, b = design.draw(), design.draw()
    np.testing.assert_array_equal(a.treated, b.treated)
    assert a.n_treated == 30
    assert a.eligible[a.treated].all()
    other = Design.from_spec(design.spec.replace(seed=124), units=units, graph=graph).draw()
    assert not np.array_equal(a.treated, other.treated)


def test_same_spec_and_seed_give_the_same_assignment_in_another_process(tmp_path, region_path):
    spec = DesignSpec.from_dict(spec_dict(region_path, gap_m=120.0))
    path = tmp_path / "design.toml"
    spec.to_toml(path)
    script = textwrap.dedent(
        f"""
        from geoexp.design import Design, DesignSpec
        d = Design.from_spec(DesignSpec.from_toml({str(path)!r}))
        print(",".join(sorted(d.units.ids[d.draw().treated])))
        """
    )
    runs = [
        subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, check=True)
        for _ in range(2)
    ]
    assert runs[0].stdout == runs[1].stdout
    assert len(runs[0].stdout.strip().split(",")) == 30


def test_blocked_design_treats_the_quota_in_every_block(region_path, units, graph):
    design = make(
        region_path,
        units,
        graph,
        method="blocked",
        block_column="district",
        block_share=0.25,
        treated=None,
    )
    blocks = units.frame["district"].to_numpy()
    draws = design.sampler.draw_many(300, 1)
    dense = draws.to_dense()
    elig_blocks = pd.Series(blocks[design.eligible])
    sizes = elig_blocks.value_counts()
    quotas = np.floor(0.25 * sizes + 0.5).astype(int)  # round half up, as documented
    for label, quota in quotas.items():
        in_block = design.eligible & (blocks == label)
        # [A] every draw treats exactly the quota, so P(treated) = quota / block size exactly
        assert (dense[:, in_block].sum(axis=1) == quota).all()
    probs = design.probabilities(2000)
    p = probs.probabilities[:, 0]
    se = probs.mc_error[:, 0]
    expected = np.zeros(units.n)
    for label, quota in quotas.items():
        expected[design.eligible & (blocks == label)] = quota / sizes[label]
    assert np.all(np.abs(p - expected) <= 4 * se + 1e-12)


def test_kept_apart_design_keeps_treated_units_apart(region_path, units, graph):
    design = make(region_path, units, graph, gap_m=200.0)
    geoms = units.geometry.to_numpy()
    for r in range(5):
        treated = design.sampler.draw(r)
        g = geoms[treated]
        # brute-force shapely distances between all treated pairs
        d = shapely.distance(g[:, None], g[None, :])
        np.fill_diagonal(d, np.inf)
        assert d.min() >= 200.0


def test_infeasible_gap_says_what_is_possible(region_path, units, graph):
    with pytest.raises(InfeasibleDesignError, match=r"at most \d+"):
        make(region_path, units, graph, gap_m=300.0, treated=110)


def test_pure_control_floor_is_met_by_every_draw(region_path, units, graph):
    design = make(region_path, units, graph, gap_m=150.0, min_pure_controls=40)
    probs_draws = design.sampler.draw_many(200, 3)
    from geoexp.exposure import assign_conditions

    for r in range(0, 200, 20):
        cond = assign_conditions(design.graph, design.mapping, probs_draws.treated(r))
        assert ((cond == design.mapping.pure_control) & design.eligible).sum() >= 40


def test_impossible_floor_is_refused(region_path, units, graph):
    with pytest.raises(InfeasibleDesignError, match="min_pure_controls"):
        make(region_path, units, graph, min_pure_controls=119)


def test_exclusion_zone_drops_units(tmp_path, region_path, units, graph):
    import geopandas as gpd

    centre = units.geometry.iloc[0].centroid
    zone = gpd.GeoDataFrame(geometry=[centre.buffer(400)], crs=units.crs).to_crs(4326)
    zone.to_file(tmp_path / "zone.geojson", driver="GeoJSON")
    data = spec_dict(region_path)
    data["eligible"] = {"exclude": [str(tmp_path / "zone.geojson")]}
    design = Design.from_spec(DesignSpec.from_dict(data), units=units, graph=graph)
    inside = units.geometry.intersects(centre.buffer(400)).to_numpy()
    assert inside.sum() > 0
    assert not (design.eligible & inside).any()
    assert design.eligible[~inside].all()


# ---- check -------------------------------------------------------------------


def test_check_reports_conditions_and_verdict(region_path, units, graph):
    design = make(region_path, units, graph, gap_m=150.0)
    assignment = design.draw()
    check = check_design(design, n_draws=300, assignment=assignment)
    # [A] a fixed-m design: the expected number of treated units is m
    assert check.expected.loc["treated", "expected_units"] == pytest.approx(30)
    assert check.expected.loc["treated", "drawn"] == 30
    assert check.expected["expected_units"].sum() == pytest.approx(units.n)
    assert any(line.startswith("Direct effect") for line in check.verdict)
    assert "Verdict" in str(check) and "## Design check" in check.to_markdown()
    assert ("incidents_y1", "treated vs pure control") in check.balance.index


# ---- trial file ----------------------------------------------------------------


def test_trial_file_locks_and_keeps_superseded_assignments(tmp_path, region_path, units, graph):
    design = make(region_path, units, graph)
    first = design.draw()
    path = tmp_path / "trial.gpkg"
    tf = write_trial(path, design, first, design.probabilities(200))
    assert tf.is_locked and tf.spec_hash == design.spec.hash
    assert {"units", "assignment", "probabilities", "trial_meta"} <= tf.layers
    stored = tf.assignment()
    assert stored["treated"].sum() == 30
    assert set(stored.index[stored["treated"].astype(bool)]) == set(units.ids[first.treated])
    assert tf.spec() == design.spec

    other = Design.from_spec(design.spec.replace(seed=999), units=units, graph=graph)
    with pytest.raises(LockedTrialError, match="replace"):
        write_trial(path, other, other.draw())
    assert TrialFile.open(path).meta["seed"] == "123"  # untouched after the refusal

    write_trial(path, other, other.draw(), replace=True, reason="units file corrected")
    tf = TrialFile.open(path)
    assert tf.meta["seed"] == "999" and tf.meta["draw_number"] == "2"
    old = pyogrio.read_dataframe(path, layer="superseded_assignments")
    old_treated = set(old.loc[old["treated"].astype(bool), "segment_id"])
    assert old_treated == set(units.ids[first.treated])
    assert (old["reason"] == "units file corrected").all()


def test_field_csv_lists_eligible_units(tmp_path, region_path, units, graph):
    design = make(region_path, units, graph)
    tf = write_trial(tmp_path / "t.gpkg", design, design.draw())
    table = export_assignment_csv(tf, tmp_path / "field.csv")
    read = pd.read_csv(tmp_path / "field.csv")
    assert list(read.columns) == ["segment_id", "district", "description", "condition", "treated"]
    assert len(read) == 120 and read["treated"].sum() == 30
    assert read["treated"].iloc[:30].all()  # treated first
    assert table.index.name == "segment_id"


def test_saturation_design_from_a_spec(region_path, units, graph):
    design = make(
        region_path,
        units,
        graph,
        method="saturation",
        treated=None,
        cluster_column="district",
        saturations=[0.0, 0.3, 0.6],
        cluster_counts=[2, 3, 3],
    )
    assignment = design.draw()
    levels = assignment.extra["cluster_level"]
    # [A] complete randomization of 8 districts to levels: 2 at 0, 3 at 0.3, 3 at 0.6
    assert sorted(np.bincount(levels, minlength=3)) == [2, 3, 3]
    districts = units.frame["district"].to_numpy()
    labels = design.sampler.cluster_labels
    for code, label in enumerate(labels):
        here = design.eligible & (districts == label)
        s = design.sampler.saturations[levels[code]]
        assert assignment.treated[here].sum() == np.floor(s * here.sum() + 0.5)


def test_rerandomized_design_from_a_spec(region_path, units, graph):
    data = spec_dict(region_path)
    data["rerandomize"] = {"covariates": ["incidents_y1", "length_m"], "acceptance": 0.2}
    design = Design.from_spec(DesignSpec.from_dict(data), units=units, graph=graph)
    draws = design.sampler.draw_many(200, 1)
    assert (design.sampler.mahalanobis(draws) <= design.sampler.threshold).all()


def test_distances_in_feet_are_converted_to_metres(region_path):
    data = spec_dict(region_path, gap_ft=500)
    data["exposure"] = {"bands_ft": [500, 1000]}
    spec = DesignSpec.from_dict(data)
    # 1 international foot = 0.3048 m exactly (by definition since 1959)
    assert spec.exposure.bands_m == pytest.approx((152.4, 304.8))
    assert spec.assignment.gap_m == pytest.approx(152.4)
    metres = spec_dict(region_path, gap_m=152.4)
    metres["exposure"] = {"bands_m": [152.4, 304.8], "unit": "ft"}
    assert DesignSpec.from_dict(metres).hash == spec.hash
    # outputs speak the unit the spec was written in
    from geoexp.exposure import ExposureMapping

    mapping = ExposureMapping(spec.exposure.bands_m, unit=spec.exposure.unit)
    assert mapping.labels[1:3] == ("spillover 0-500 ft", "spillover 500-1000 ft")
    data["exposure"]["bands_m"] = [1]
    with pytest.raises(DesignError, match="not both"):
        DesignSpec.from_dict(data)


def test_check_reports_spatial_autocorrelation_of_the_baseline(region_path, units, graph):
    design = make(region_path, units, graph)
    check = check_design(design, n_draws=200)
    moran = check.autocorrelation
    assert moran is not None and moran.distance == 150.0
    again = morans_i(
        graph,
        units.frame["incidents_y1"].to_numpy(dtype=float),
        distance=150.0,
        permutations=9,
        rng=0,
    )
    assert moran.statistic == pytest.approx(again.statistic)
    assert "Moran's I" in str(check)


def test_check_says_when_extreme_weights_make_a_contrast_unreliable(region_path, units, graph):
    # 110 of 120 eligible units treated: pure controls among them are rare, so the
    # weights of the pure-control side are extreme (Kish effective sample size near 1)
    design = make(region_path, units, graph, treated=110)
    check = check_design(design, n_draws=300)
    direct = next(line for line in check.verdict if line.startswith("Direct effect"))
    assert "Not reliably estimable" in direct
    assert "effective sample size" in direct and "fewer treated units" in direct
    fine = check_design(make(region_path, units, graph), n_draws=300)
    direct = next(line for line in fine.verdict if line.startswith("Direct effect"))
    assert "Not reliably estimable" not in direct


def test_check_refuses_the_direct_hajek_estimate_when_the_number_treated_is_random(
    region_path, units, graph
):
    import itertools
    import re

    design = make(
        region_path,
        units,
        graph,
        method="saturation",
        treated=None,
        cluster_column="district",
        saturations=[0.0, 0.3, 0.6],
        cluster_counts=[2, 3, 3],
    )
    check = check_design(design, n_draws=400)
    direct = next(line for line in check.verdict if line.startswith("Direct effect"))
    assert "Not reliably estimable by the default (Hajek) estimator" in direct
    assert "Hartley & Ross 1954" in direct and "clusters of equal size" in direct
    # the coefficient of variation of the number treated, exactly: every one of the
    # 8! / (2! 3! 3!) = 560 equally likely ways to give 8 districts the levels 2/3/3,
    # each district treating floor(s n + 1/2) of its n eligible units
    districts = units.frame["district"].to_numpy()
    sizes = [int((design.eligible & (districts == c)).sum()) for c in design.sampler.cluster_labels]
    totals = []
    for zeros in itertools.combinations(range(8), 2):
        rest = [i for i in range(8) if i not in zeros]
        for low in itertools.combinations(rest, 3):
            totals.append(sum(np.floor((0.3 if i in low else 0.6) * sizes[i] + 0.5) for i in rest))
    assert len(totals) == 560  # multinomial coefficient 8!/(2! 3! 3!)
    exact = np.std(totals) / np.mean(totals)
    shown = float(re.search(r"coefficient of variation ([0-9.]+)", direct).group(1))
    # 400 draws: the CV's Monte Carlo error is about cv / sqrt(2 x 400) < 0.01
    assert abs(shown - exact) < 0.03
    # a fixed number treated: no such refusal
    fixed = check_design(make(region_path, units, graph), n_draws=300)
    direct = next(line for line in fixed.verdict if line.startswith("Direct effect"))
    assert "default (Hajek) estimator" not in direct


def test_balance_leaves_out_identifier_columns(region_path, units, graph):
    import geoexp.design._check as check_module

    frame = pd.DataFrame(
        {
            "segment_id": np.arange(5),  # named like an id
            "code": np.array([11, 12, 13, 14, 15]),  # whole numbers, one per unit: a code
            "incidents": np.array([1, 0, 3, 1, 0]),  # repeated counts: a real covariate
            "rate": np.array([0.5, 0.1, 0.5, 0.2, 0.3]),
        }
    )
    kept = [c for c in frame.columns if not check_module._identifier_like(c, frame[c])]
    # Counted by hand from the columns above.
    assert kept == ["incidents", "rate"]


def test_chance_imbalance_gives_the_gap_and_the_advice(region_path, units, graph):
    # Seeds tried in order until a draw lands more than 0.1 from the design's average on the
    # baseline (with 30 of 120 treated such draws are common); the wording is then checked.
    found = []
    for seed in range(1, 30):
        data = spec_dict(region_path, gap_m=150.0)
        data["seed"] = seed
        design = Design.from_spec(DesignSpec.from_dict(data), units=units, graph=graph)
        check = check_design(design, n_draws=200, assignment=design.draw())
        found = [line for line in check.verdict if "differs by chance" in line]
        if found:
            break
    assert found, "no seed gave a chance imbalance: the check never reports one"
    for line in found:
        assert "[rerandomize]" in line and "never change the seed" in line and "a gap of" in line
    # The wording never calls a difference "imbalanced" against a threshold it does not pass.
    assert not any("is imbalanced" in line for line in check.verdict)
