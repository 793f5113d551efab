"""The unit flow of a design: every step's count recomputed outside the flow code."""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pytest
import shapely

from geoexp.design import Design, DesignSpec, unit_flow


@pytest.fixture(scope="module")
def demo_design(demo):
    spec = DesignSpec.from_toml(demo / "design.toml")
    design = Design.from_spec(spec)
    return design, design.draw()


def test_flow_adds_up_to_the_design_own_numbers(demo_design, demo):
    design, assignment = demo_design
    flow = unit_flow(design, assignment, n_analysed=design.units.n)
    counts = {s.label: s for s in flow.steps}
    assert not flow.recorded
    # Each box is the previous box less what its step removed (identity of the flow).
    eligibility = flow.steps[: [s.label for s in flow.steps].index("Randomized")]
    for before, after in zip(eligibility[:-1], eligibility[1:], strict=True):
        assert after.n_units == before.n_units - after.n_removed
    assert flow.steps[0].n_units == design.units.n
    assert eligibility[-1].n_units == int(design.eligible.sum()) == 150  # the spec's top_k
    assert flow.n_treated == assignment.n_treated == int(assignment.treated.sum())
    assert counts["Analysed (units with outcomes)"].n_units == design.units.n
    # Zone step against shapely directly: units whose geometry intersects the drawn zone.
    zone = gpd.read_file(demo / "exclusion_zones.geojson").to_crs(design.units.frame.crs)
    inside = shapely.intersects(
        np.asarray(design.units.frame.geometry.array, dtype=object), zone.union_all()
    )
    assert counts["Outside the exclusion zones"].n_removed == int(inside.sum()) > 0


def test_tie_break_count(region_path, demo):
    spec = DesignSpec.from_toml(demo / "design.toml")
    frame = gpd.read_file(region_path, layer="segments")
    values = np.sort(frame["incidents_y1"].to_numpy(float))[::-1]
    # Choose a cut-off inside a run of equal counts, so the tie-break must drop some units.
    k = next(k for k in range(100, 400) if values[k - 1] == values[k])
    data = spec.to_dict()
    data["eligible"] = {"top_column": "incidents_y1", "top_k": k}
    design = Design.from_spec(DesignSpec.from_dict(data, base_dir=str(demo)))
    flow = unit_flow(design)
    cut = values[k - 1]
    # Units at the cut-off value beyond the first k in descending order (numpy sort).
    expected = int((values == cut).sum() - (values[:k] == cut).sum())
    assert flow.n_tied_dropped == expected > 0
    assert f"{expected:,} tied" in str(flow)


def test_recorded_eligibility_is_one_box(demo_design):
    design, assignment = demo_design
    other = design.eligible.copy()
    other[np.flatnonzero(~other)[0]] = True  # not what the spec's rules give
    rebuilt = Design.from_spec(design.spec, units=design.units, graph=design.graph, eligible=other)
    flow = unit_flow(rebuilt)
    assert flow.recorded
    assert [s.label for s in flow.steps] == ["All units in the layer", "Eligible (as recorded)"]
    assert flow.steps[-1].n_units == int(other.sum())


def test_flow_of_units_is_the_design_flow(demo_design):
    # The flow from spec, units and eligibility alone (no graph) is the design's flow.
    from geoexp.design import unit_flow_of

    design, assignment = demo_design
    full = unit_flow(design, assignment, n_analysed=design.units.n - 3)
    alone = unit_flow_of(
        design.spec,
        design.units,
        design.eligible,
        n_treated=assignment.n_treated,
        n_analysed=design.units.n - 3,
    )
    assert alone == full
    assert unit_flow_of(design.spec, design.units, design.eligible) == unit_flow(design)
