"""Design specs: strict types and ranges, draws bounded by memory, reading files, builders."""

from __future__ import annotations

import copy
import datetime as dt
import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from geoexp.design import (
    MAX_DRAWS,
    SAMPLER_BUILDERS,
    BlockedSampler,
    CompleteSampler,
    Design,
    DesignSpec,
    PureControlFloor,
    Rerandomized,
    Sampler,
    SaturationSampler,
    SeparatedSampler,
    build_sampler,
    check_draws,
    eligible_for,
    fixed_treated,
    monte_carlo_bytes,
    units_for,
)
from geoexp.errors import DesignError, GeoexpError, InfeasibleDesignError, InputError
from geoexp.graph import ExposureGraph
from geoexp.sampleregion import synthetic_grid
from geoexp.units import UnitSet

N_UNITS = 36


def _frame():
    frame = synthetic_grid(N_UNITS)
    ids = frame["unit_id"].to_numpy()
    frame["incidents"] = (ids * 7) % 11
    frame["zone"] = np.where(ids % 2 == 0, "north", "south")
    frame["cluster"] = [f"c{i % 6}" for i in ids]
    frame["covariate"] = np.sin(ids).round(3)
    frame["label"] = [f"unit {i}" for i in ids]
    frame["flag"] = ids % 3 == 0
    return frame


@pytest.fixture(scope="module")
def units():
    return UnitSet.from_frame(_frame(), "unit_id", source="grid.gpkg")


def base_spec() -> dict:
    return {
        "name": "grid trial",
        "seed": 11,
        "draws": 100,
        "units": {"path": "grid.gpkg", "id_column": "unit_id"},
        "eligible": {"where": "incidents >= 1", "top_column": "incidents", "top_k": 24},
        "assignment": {"method": "complete", "treated": 6},
        "exposure": {"bands_m": [150, 300]},
        "field": {"district_column": "zone"},
    }


def with_change(path: tuple[str, ...], value) -> dict:
    data = base_spec()
    node = data
    for key in path[:-1]:
        node = node.setdefault(key, {})
    node[path[-1]] = value
    return data


# ---- at least 30 bad specs, each with our class and the words of its message ----
BAD = [
    (("assignment", "treated"), 12.7, "[assignment] treated", "not a fraction"),
    (("exposure", "positivity_floor"), 0.5, "[exposure] positivity_floor", "probability"),
    (("exposure", "positivity_floor"), -0.01, "[exposure] positivity_floor", "probability"),
    (("assignment", "treated"), "forty", "[assignment] treated", "text 'forty'"),
    (("assignment", "treated"), True, "[assignment] treated", "true/false True"),
    (("assignment", "treated"), 0, "[assignment] treated", "from 1"),
    (("assignment", "treated"), [5], "[assignment] treated", "list [5]"),
    (("draws",), 250.5, "draws", "not a fraction"),
    (("draws",), "many", "draws", "text 'many'"),
    (("draws",), 10**12, "draws", "to 10,000,000"),
    (("draws",), 99, "draws", "from 100"),
    (("draws",), float("inf"), "draws", "number inf"),
    (("seed",), -1, "seed", "from 0"),
    (("seed",), 1.5, "seed", "not a fraction"),
    (("seed",), "7", "seed", "text '7'"),
    (("name",), 5, "name", "non-empty text"),
    (("name",), "", "name", "non-empty text"),
    (("eligible", "top_k"), 0, "[eligible] top_k", "from 1"),
    (("eligible", "top_k"), 2.5, "[eligible] top_k", "not a fraction"),
    (("eligible", "top_column"), 0, "[eligible] top_column", "non-empty text"),
    (("eligible", "top_share"), 1.5, "[eligible] top_share", "share in (0, 1]"),
    (("eligible", "exclude"), 5, "[eligible] exclude[0]", "non-empty text"),
    (("eligible", "exclude"), {"a": 1}, "[eligible] exclude[0]", "dict"),
    (("eligible", "exclude_how"), "touches", "[eligible] exclude_how", "'intersects'"),
    (("eligible", "where"), 3, "[eligible] where", "non-empty text"),
    (("eligible", "surprise"), 3, "unknown key(s) ['surprise'] in [eligible]", "top_k"),
    (("exposure", "bands_m"), "150", "[exposure] bands_m[0]", "text '150'"),
    (("exposure", "bands_m"), [150, -3], "[exposure] bands_m[1]", "distance in (0, 100000]"),
    (("exposure", "bands_m"), [300, 150], "bands_m must be increasing", "[300, 150]"),
    (("exposure", "bands_m"), [], "[exposure] bands_m", "non-empty list"),
    (("exposure", "bands_m"), [float("nan")], "[exposure] bands_m[0]", "nan"),
    (("exposure", "metric"), "manhattan", "[exposure] metric", "'euclidean'"),
    (("exposure", "snap_tolerance_m"), -1, "[exposure] snap_tolerance_m", "metres in [0"),
    (("exposure", "bands_ft"), ["x"], "[exposure] bands_ft[0]", "feet"),
    (("assignment", "share"), 1.0, "[assignment] share", "share in (0, 1)"),
    (("assignment", "method"), "random", "[assignment] method", "'complete'"),
    (("assignment", "gap_m"), 0, "[assignment] gap_m", "distance in (0"),
    (("assignment", "gap_m"), "150", "[assignment] gap_m", "text '150'"),
    (("assignment", "min_pure_controls"), -2, "[assignment] min_pure_controls", "from 0"),
    (("assignment", "block_quotas"), 4, "[assignment] block_quotas", "a table"),
    (("assignment", "saturations"), [0.5, 2], "[assignment] saturations[1]", "[0, 1]"),
    (("assignment", "cluster_counts"), "3", "[assignment] cluster_counts", "a list"),
    (("rerandomize", "acceptance"), 0, "[rerandomize] acceptance", "(0, 1]"),
    (("rerandomize", "covariates"), [1, 2], "[rerandomize] covariates[0]", "non-empty text"),
    (("units", "id_column"), None, "needs ['id_column']", "[units]"),
    (("units", "path"), 3, "[units] path", "non-empty text"),
    (("units", "crs"), True, "[units] crs", "EPSG code"),
    (("field", "district_column"), ["a"], "[field] district_column", "list"),
    (("surprise",), 1, "unknown top-level keys ['surprise']", "[units]"),
    (("units",), "grid.gpkg", "[units] must be a table", "text 'grid.gpkg'"),
    (("eligible", "where"), "incidents >", "rule", "expected a column"),
]


@pytest.mark.parametrize(("path", "value", "where", "words"), BAD)
def test_bad_specs_raise_our_error_naming_key_and_value(path, value, where, words):
    data = with_change(path, value)
    if path == ("units", "id_column"):
        del data["units"]["id_column"]
    if path[-1] == "bands_ft":
        del data["exposure"]["bands_m"]
    if path[0] == "rerandomize":
        data["rerandomize"].setdefault("covariates", ["covariate"])
    with pytest.raises(DesignError) as info:
        DesignSpec.from_dict(data, source="design.toml")
    message = str(info.value)
    assert "design.toml" in message
    assert where in message
    assert words in message


def test_bad_cases_are_many():
    assert len(BAD) >= 30


def test_integral_floats_read_as_integers():
    data = with_change(("assignment", "treated"), 12.0)
    data["draws"] = 1e3
    spec = DesignSpec.from_dict(data)
    assert spec.assignment.treated == 12 and isinstance(spec.assignment.treated, int)
    assert spec.draws == 1000 and isinstance(spec.draws, int)
    # the hash sees the integer, so 12.0 and 12 are the same design
    assert spec.hash == DesignSpec.from_dict({**data, "draws": 1000}).hash


def test_positivity_floor_is_declared_in_the_spec_and_left_out_when_unset():
    spec = DesignSpec.from_dict(with_change(("exposure", "positivity_floor"), 0.02))
    assert spec.exposure.positivity_floor == 0.02
    assert spec.to_dict()["exposure"]["positivity_floor"] == 0.02
    unset = DesignSpec.from_dict(base_spec())
    assert unset.exposure.positivity_floor is None
    # an unset floor leaves the spec's identity as it was before the key existed
    assert "positivity_floor" not in unset.to_dict()["exposure"]
    assert unset.hash != spec.hash


def test_single_band_and_single_exclusion_zone_are_lists():
    spec = DesignSpec.from_dict(with_change(("exposure", "bands_m"), 200))
    assert spec.exposure.bands_m == (200,)
    spec = DesignSpec.from_dict(with_change(("eligible", "exclude"), "zone.geojson"))
    assert spec.eligible.exclude == ("zone.geojson",)


def test_feet_checked_then_converted():
    data = base_spec()
    data["exposure"] = {"bands_ft": [500, 1000]}
    spec = DesignSpec.from_dict(data)
    # 1 international foot = 0.3048 m exactly (the 1959 international yard and pound agreement)
    assert spec.exposure.bands_m == pytest.approx((152.4, 304.8))
    assert spec.exposure.unit == "ft"


def test_spec_built_directly_is_checked_too():
    spec = DesignSpec.from_dict(base_spec())
    with pytest.raises(DesignError, match="draws must be a number of Monte Carlo draws"):
        spec.replace(draws=250.5)
    with pytest.raises(DesignError, match="seed"):
        spec.replace(seed="x")


def test_spec_is_a_pure_value():
    # Reading layers and applying rules lives in the builders, not on the spec.
    assert not hasattr(DesignSpec, "read_units")
    assert not hasattr(DesignSpec, "eligible_units")


# ---- reading spec files ------------------------------------------------------
def test_spec_files_that_are_not_text(tmp_path):
    latin = tmp_path / "latin1.toml"
    latin.write_bytes('name = "Café"\nseed = 1\n'.encode("latin-1"))
    with pytest.raises(DesignError, match="not UTF-8"):
        DesignSpec.from_toml(latin)
    binary = tmp_path / "binary.toml"
    binary.write_bytes(bytes(range(256)))
    with pytest.raises(DesignError, match="latin1|binary|UTF-8"):
        DesignSpec.from_toml(binary)
    nul = tmp_path / "nul.toml"
    nul.write_bytes(b"name = 1\x00\x00\x00")
    with pytest.raises(DesignError, match="binary file"):
        DesignSpec.from_toml(nul)
    with pytest.raises(DesignError, match="not a file"):
        DesignSpec.from_toml(tmp_path)
    with pytest.raises(DesignError, match="does not exist"):
        DesignSpec.from_toml(tmp_path / "missing.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("name = ", encoding="utf-8")
    with pytest.raises(DesignError, match="not valid TOML"):
        DesignSpec.from_toml(bad)
    with pytest.raises(DesignError, match="table of keys"):
        DesignSpec.from_dict(["name"])  # type: ignore[arg-type]


# ---- draws and memory ----------------------------------------------------------
def test_monte_carlo_bytes_by_hand():
    # 1,000 draws of 10 treated: 1000 * (4 * 10 + 8) bytes of CSR;
    # 50 units x 4 conditions x 16 words (ceil(1000 / 64)) x 8 bytes of condition bits.
    assert monte_carlo_bytes(1000, 10, 50, 4) == 1000 * 48 + 50 * 4 * 16 * 8


def test_check_draws_bounds_and_memory():
    assert check_draws(500, n_treated=5, n_units=50, n_conditions=4) == 500
    assert check_draws(5e2, n_treated=5, n_units=50, n_conditions=4) == 500
    for bad, words in [(True, "whole number"), ("10", "whole number"), (2.5, "whole number")]:
        with pytest.raises(DesignError, match=words):
            check_draws(bad, n_treated=5, n_units=50, n_conditions=4)
    with pytest.raises(DesignError, match="between 1 and 10,000,000"):
        check_draws(MAX_DRAWS + 1, n_treated=5, n_units=50, n_conditions=4)
    need = monte_carlo_bytes(100_000, 1000, 1_000_000, 4)
    with pytest.raises(DesignError, match=r"GiB of memory.*cap of 0\.50 GiB.*at most about"):
        check_draws(100_000, n_treated=1000, n_units=1_000_000, n_conditions=4, cap_bytes=2**29)
    assert need > 2**29


def test_memory_cap_from_environment(monkeypatch):
    monkeypatch.setenv("GEOEXP_MEMORY_CAP_GB", "0.000001")
    with pytest.raises(DesignError, match="GEOEXP_MEMORY_CAP_GB"):
        check_draws(10_000, n_treated=50, n_units=1000, n_conditions=4)
    monkeypatch.setenv("GEOEXP_MEMORY_CAP_GB", "lots")
    with pytest.raises(DesignError, match="positive number of gigabytes"):
        check_draws(10_000, n_treated=50, n_units=1000, n_conditions=4)


def test_design_checks_draws_against_memory(units, monkeypatch):
    design = Design.from_spec(DesignSpec.from_dict(base_spec()), units=units)
    with pytest.raises(DesignError, match="n_draws must be a whole number"):
        design.probabilities(n_draws=100.5)
    with pytest.raises(DesignError, match="between 1 and"):
        design.probabilities(n_draws=10**12)
    monkeypatch.setenv("GEOEXP_MEMORY_CAP_GB", "0.000001")
    with pytest.raises(DesignError, match="draws = 100 Monte Carlo draws would need"):
        Design.from_spec(DesignSpec.from_dict(base_spec()), units=units)


# ---- columns named by the spec --------------------------------------------------
@pytest.mark.parametrize(
    ("change", "error", "words"),
    [
        ({"rerandomize": {"covariates": ["label"]}}, DesignError, "covariate 'label'"),
        ({"rerandomize": {"covariates": ["flag"]}}, DesignError, "must hold numbers"),
        ({"rerandomize": {"covariates": ["nothing"]}}, DesignError, "['nothing']"),
        (
            {"assignment": {"method": "blocked", "block_column": "nothing", "block_treated": 1}},
            DesignError,
            "block column 'nothing'",
        ),
        (
            {
                "assignment": {
                    "method": "saturation",
                    "cluster_column": "geometry",
                    "saturations": [0, 0.5],
                    "cluster_counts": [3, 3],
                }
            },
            DesignError,
            "cluster column 'geometry'",
        ),
        ({"eligible": {"top_column": "label", "top_k": 3}}, InputError, "column 'label'"),
        ({"eligible": {"top_column": "nothing", "top_k": 3}}, InputError, "no column 'nothing'"),
        ({"eligible": {"where": "label > 3"}}, InputError, "holds text"),
    ],
)
def test_columns_of_the_wrong_kind_name_column_and_file(units, change, error, words):
    data = base_spec()
    for table, values in change.items():
        data[table] = values
    spec = DesignSpec.from_dict(data)
    with pytest.raises(error) as info:
        Design.from_spec(spec, units=units)
    assert words in str(info.value)
    assert "grid.gpkg" in str(info.value)


# ---- builders and the sampler protocol -----------------------------------------
def _designs(units):
    specs = {
        "complete": {"method": "complete", "treated": 6},
        "blocked": {"method": "blocked", "block_column": "zone", "block_treated": 3},
        "separated": {"method": "complete", "treated": 4, "gap_m": 120},
        "saturation": {
            "method": "saturation",
            "cluster_column": "cluster",
            "saturations": [0, 0.5],
            "cluster_counts": [3, 3],
        },
    }
    out = {}
    for name, assignment in specs.items():
        data = base_spec()
        data["eligible"] = {}
        data["assignment"] = assignment
        out[name] = Design.from_spec(DesignSpec.from_dict(data), units=units)
    data = base_spec()
    data["rerandomize"] = {"covariates": ["covariate"], "acceptance": 0.5}
    out["rerandomized"] = Design.from_spec(DesignSpec.from_dict(data), units=units)
    data = base_spec()
    data["assignment"] = {"method": "complete", "treated": 2, "min_pure_controls": 1}
    data["exposure"] = {"bands_m": [60]}
    out["floor"] = Design.from_spec(DesignSpec.from_dict(data), units=units)
    return out


def test_every_sampler_satisfies_the_protocol(units):
    kinds = {
        "complete": CompleteSampler,
        "blocked": BlockedSampler,
        "separated": SeparatedSampler,
        "saturation": SaturationSampler,
        "rerandomized": Rerandomized,
        "floor": PureControlFloor,
    }
    designs = _designs(units)
    for name, design in designs.items():
        sampler = design.sampler
        assert isinstance(sampler, kinds[name]), name
        assert isinstance(sampler, Sampler), name
        draws = sampler.draw_many(3, 5)
        assert draws.n_draws == 3 and sampler.n_units == units.n
        chunks = list(sampler.iter_chunks(3, 5))
        assert sum(c.n_draws for c in chunks) == 3
        assert isinstance(sampler.describe(), str)
    assert not isinstance(object(), Sampler)
    assert fixed_treated(designs["complete"].sampler) == 6
    assert fixed_treated(designs["blocked"].sampler) == 6  # 3 in each of 2 zones
    assert fixed_treated(designs["floor"].sampler) == 2
    assert fixed_treated(designs["saturation"].sampler) is None
    assert set(SAMPLER_BUILDERS) == {"complete", "blocked", "saturation"}


def test_builders_give_the_same_assignment_as_the_sampler_itself(units):
    # The registry must not change the random procedure: the design's assignment is the
    # first draw of CompleteSampler on child stream 0 of the seed.
    spec = DesignSpec.from_dict(base_spec())
    design = Design.from_spec(spec, units=units)
    eligible = eligible_for(spec, units)
    mask = np.asarray(units.ids.isin(eligible.ids))
    direct = CompleteSampler(units.n, np.flatnonzero(mask), 6)
    first = np.sort(direct.draw_many(1, design.seed_streams[0]).treated(0))
    assert np.array_equal(np.flatnonzero(design.draw().treated), first)
    again = build_sampler(spec, units, mask, design.graph, design.mapping)
    assert np.array_equal(again.draw_many(50, 9).indices, design.sampler.draw_many(50, 9).indices)


def test_units_for_reads_the_layer(tmp_path):
    path = tmp_path / "grid.gpkg"
    _frame().to_file(path, layer="units", engine="pyogrio")
    data = base_spec()
    data["units"] = {"path": "grid.gpkg", "id_column": "unit_id", "layer": "units"}
    spec = DesignSpec.from_dict(data, base_dir=str(tmp_path))
    units = units_for(spec)
    assert units.n == N_UNITS
    eligible = eligible_for(spec, units)
    # hand count: incidents = 7 i mod 11 is zero for i = 11, 22, 33, so 33 units pass the rule
    assert "incidents >= 1" in " ".join(eligible.notes)
    assert eligible.n == 24


# ---- fuzzing: only geoexp's own errors --------------------------------------------
_GARBAGE = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(-(10**13), 10**13),
    st.integers(-5, 40),
    st.floats(allow_nan=True, allow_infinity=True),
    st.floats(0, 1),
    st.floats(-1000, 1000),
    st.text(max_size=12),
    st.sampled_from(
        [
            "incidents",
            "zone",
            "cluster",
            "covariate",
            "label",
            "flag",
            "geometry",
            "unit_id",
            "nothing",
            "complete",
            "blocked",
            "saturation",
            "network",
            "euclidean",
            "ft",
            "within",
            "incidents > 2 and zone == 'north'",
            "label > 3",
            "`x` == 1 or",
            "missing.toml",
        ]
    ),
    st.lists(st.one_of(st.integers(-3, 500), st.floats(-1, 600), st.text(max_size=4)), max_size=4),
    st.lists(st.floats(0, 1), min_size=1, max_size=3),
    st.lists(st.integers(0, 6), min_size=1, max_size=3),
    st.dictionaries(st.text(max_size=5), st.integers(-2, 5), max_size=3),
    st.just(dt.datetime(2026, 1, 1)),
    st.just(dt.date(2026, 1, 1)),
)

_KEYS = [
    ("name",),
    ("seed",),
    ("draws",),
    ("units",),
    ("units", "path"),
    ("units", "id_column"),
    ("units", "crs"),
    ("units", "layer"),
    ("eligible",),
    ("eligible", "where"),
    ("eligible", "top_column"),
    ("eligible", "top_k"),
    ("eligible", "top_share"),
    ("eligible", "exclude"),
    ("eligible", "exclude_how"),
    ("assignment",),
    ("assignment", "method"),
    ("assignment", "treated"),
    ("assignment", "share"),
    ("assignment", "block_column"),
    ("assignment", "block_share"),
    ("assignment", "block_treated"),
    ("assignment", "block_quotas"),
    ("assignment", "gap_m"),
    ("assignment", "gap_ft"),
    ("assignment", "min_pure_controls"),
    ("assignment", "cluster_column"),
    ("assignment", "saturations"),
    ("assignment", "cluster_counts"),
    ("rerandomize",),
    ("rerandomize", "covariates"),
    ("rerandomize", "acceptance"),
    ("exposure",),
    ("exposure", "bands_m"),
    ("exposure", "bands_ft"),
    ("exposure", "metric"),
    ("exposure", "snap_tolerance_m"),
    ("exposure", "unit"),
    ("field", "district_column"),
    ("surprise",),
    ("assignment", "surprise"),
]


@st.composite
def _mutated_specs(draw):
    data = base_spec()
    for _ in range(draw(st.integers(1, 4))):
        path = draw(st.sampled_from(_KEYS))
        action = draw(st.sampled_from(["set", "set", "set", "delete"]))
        node = data
        for key in path[:-1]:
            child = node.get(key)
            if not isinstance(child, dict):
                child = {}
                node[key] = child
            node = child
        if action == "delete":
            node.pop(path[-1], None)
        else:
            node[path[-1]] = draw(_GARBAGE)
    return data


_GRAPHS: dict = {}


def _graph_for(units, spec):
    reach = max(max(spec.exposure.bands_m), spec.assignment.gap_m or 0.0)
    if spec.exposure.metric != "euclidean" or reach > 1000:
        return None
    if "g" not in _GRAPHS:
        _GRAPHS["g"] = ExposureGraph.from_units(units, 1000.0)
    return _GRAPHS["g"]


@settings(
    max_examples=1000,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)
@given(data=_mutated_specs())
def test_fuzzed_specs_raise_only_our_errors(units, data):
    original = copy.deepcopy(data)
    try:
        spec = DesignSpec.from_dict(data, source="fuzz.toml")
    except GeoexpError:
        assert data == original  # the caller's dict is never changed
        return
    assert data == original
    assert math.isfinite(spec.draws) and 100 <= spec.draws <= MAX_DRAWS
    try:
        Design.from_spec(spec, units=units, graph=_graph_for(units, spec))
    except GeoexpError:
        return


def test_fuzz_reaches_designs(units):
    # Guard against a fuzz test that cannot fail because every spec is refused early:
    # the unmutated spec and simple variants build designs.
    assert Design.from_spec(DesignSpec.from_dict(base_spec()), units=units).sampler is not None
    with pytest.raises(InfeasibleDesignError):
        Design.from_spec(
            DesignSpec.from_dict(with_change(("assignment", "treated"), 30)), units=units
        )


def test_readme_spec_examples_pass_the_strict_schema():
    """Every TOML example in the README is a spec whose keys and values the schema accepts."""
    import re
    import tomllib
    from pathlib import Path

    from geoexp.design._schema import SCHEMA, TOP

    text = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    blocks = re.findall(r"```toml\n(.*?)```", text, flags=re.S)
    assert len(blocks) >= 2
    seen: set[tuple[str, str]] = set()
    sweep_blocks = [b for b in blocks if "[grid]" in b]
    blocks = [b for b in blocks if "[grid]" not in b]
    for block in blocks:
        data = tomllib.loads(block)
        spec = DesignSpec.from_dict(data, source="README example")  # strict: unknown keys fail
        assert spec.name == data["name"]
        for table, keys in data.items():
            if isinstance(keys, dict):
                seen |= {(table, k) for k in keys}
                assert set(keys) <= set(SCHEMA[table])
            else:
                assert table in TOP
    # a sweep example is read by the sweep's own strict reader, over the README's first design
    from geoexp.sweep import SweepSpec

    first = DesignSpec.from_dict(tomllib.loads(blocks[0]), source="README example")
    for block in sweep_blocks:
        SweepSpec.from_dict(tomllib.loads(block), source="README sweep example", base=first)
    # the keys real data need are shown
    for needed in [
        ("units", "crs"),
        ("units", "planar"),
        ("units", "id_column"),
        ("units", "number_rows"),
        ("eligible", "where"),
        ("eligible", "top_column"),
        ("exposure", "snap_tolerance_m"),
        ("exposure", "split_at_crossings"),
        ("exposure", "bridge_column"),
        ("exposure", "accept_sparse_network"),
        ("rerandomize", "covariates"),
        ("assignment", "saturations"),
        ("assignment", "cluster_counts"),
        ("field", "district_column"),
        ("field", "description_column"),
        ("field", "instructions_column"),
    ]:
        assert needed in seen, needed


def test_readme_names_every_spec_key():
    """The README's key table names every key the schema accepts."""
    from pathlib import Path

    from geoexp.design._schema import SCHEMA, TOP

    text = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    keys = set(TOP) | {k for table in SCHEMA.values() for k in table}
    missing = sorted(k for k in keys if f"`{k}`" not in text)
    assert missing == []
