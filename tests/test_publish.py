"""PostGIS out: a trial run from database tables matches the GeoPackage run, and its tables
written back read the same through plain SQL (psycopg, no geoexp code)."""

from __future__ import annotations

import uuid

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from geoexp.analysis import analyse, save_results
from geoexp.cli import app
from geoexp.errors import InputError
from geoexp.publish import write_trial_tables
from geoexp.quickstart import demo_spec
from geoexp.trialfile import TrialFile

PRE = "2024-01-01:2024-12-31"
POST = "2025-01-01:2025-12-31"
SECRET = "not-a-real-pw-8213"


def _invoke(*args):
    result = CliRunner().invoke(app, [str(a) for a in args])
    assert result.exit_code == 0, result.output
    return result.output


def _with_password(url):
    # the test server trusts local connections, so any password is accepted and ignored
    return url.replace("postgresql://", f"postgresql://postgres:{SECRET}@", 1)


def _sql(url, query):
    """Rows of a query through psycopg alone, as an agency's dashboard would read them."""
    import psycopg

    with psycopg.connect(url) as conn, conn.cursor() as cur:
        cur.execute(query)
        names = [c.name for c in cur.description]
        return pd.DataFrame(cur.fetchall(), columns=names)


def _run_trial(tmp_path, region_path, units_path, units_layer, incidents):
    """Draw, count and analyse one trial through the command line; its trial file."""
    spec = demo_spec(region_path, tmp_path).replace(draws=200)
    spec = spec.replace(
        units=spec.units.__class__(path=units_path, id_column="segment_id", layer=units_layer)
    )
    spec_path = tmp_path / "design.toml"
    spec.to_toml(spec_path)
    trial = tmp_path / "trial.gpkg"
    _invoke("draw", spec_path, "--trial", trial)
    _invoke("count", trial, "--incidents", incidents, "--pre", PRE, "--post", POST)
    save_results(trial, analyse(trial, n_draws=200))
    return TrialFile.open(trial)


@pytest.fixture(scope="module")
def trials(city_db, region, region_path, tmp_path_factory):
    """The same trial run from the GeoPackage and from PostGIS tables."""
    url, schema = city_db
    file_dir = tmp_path_factory.mktemp("file")
    # the command line takes a one-layer incidents file (it has no --layer option)
    incidents_gpkg = file_dir / "incidents.gpkg"
    region.incidents.to_file(incidents_gpkg, driver="GPKG", engine="pyogrio")
    from_file = _run_trial(file_dir, region_path, str(region_path), "segments", incidents_gpkg)
    from_db = _run_trial(
        tmp_path_factory.mktemp("db"),
        region_path,
        url,
        f"{schema}.segments",
        f"{_with_password(url)}&table={schema}.incidents",
    )
    return from_file, from_db


def test_trial_from_postgis_matches_the_geopackage_trial(trials):
    from_file, from_db = trials
    assert from_db.design_fingerprint == from_file.design_fingerprint
    pd.testing.assert_frame_equal(
        from_db.assignment().drop(columns="geometry"),
        from_file.assignment().drop(columns="geometry"),
    )
    pd.testing.assert_frame_equal(from_db.read("outcomes"), from_file.read("outcomes"))
    pd.testing.assert_frame_equal(from_db.read("results"), from_file.read("results"))


def test_no_password_reaches_the_trial_file(trials):
    _, from_db = trials
    for key, value in from_db.meta.items():
        assert SECRET not in str(value), key
    assert "***" in from_db.meta["outcomes_source"]
    assert "table" in from_db.meta["units_source"]


def test_tables_written_back_read_the_same_by_plain_sql(trials, database_url):
    _, trial = trials
    schema = f"out_{uuid.uuid4().hex[:10]}"
    output = _invoke(
        "write-tables",
        trial.path,
        "--to",
        _with_password(database_url),
        "--schema",
        schema,
        "--prefix",
        "patrols_",
    )
    assert SECRET not in output and "***" in output
    for name in ("trial", "assignment", "outcomes", "results"):
        assert f"{schema}.patrols_{name}" in output

    rows = _sql(
        database_url,
        f"SELECT unit_id, treated, condition, p_treated, p_pure_control, "
        f"ST_SRID(geometry) AS srid FROM {schema}.patrols_assignment ORDER BY unit_id",
    )
    stored = trial.assignment().sort_index()
    assert list(rows["unit_id"]) == list(stored.index)
    assert list(rows["condition"]) == list(stored["condition"])
    assert list(rows["treated"]) == list(stored["treated"])
    np.testing.assert_array_equal(rows["p_treated"].to_numpy(float), stored["p_treated"])
    np.testing.assert_array_equal(rows["p_pure_control"].to_numpy(float), stored["p_pure_control"])
    assert set(rows["srid"]) == {stored.crs.to_epsg()}

    results = _sql(
        database_url,
        f"SELECT contrast, estimate, ci_low, ci_high, p_value, n_units, effect_unit "
        f"FROM {schema}.patrols_results",
    )
    expected = trial.read("results")
    assert list(results["contrast"]) == list(expected["contrast"])
    for column in ("estimate", "ci_low", "ci_high", "p_value"):
        np.testing.assert_array_equal(results[column].to_numpy(float), expected[column])
    assert list(results["n_units"]) == list(expected["n_units"])
    assert results["effect_unit"].str.startswith("incidents per unit").all()

    counts = _sql(database_url, f"SELECT unit_id, pre, post FROM {schema}.patrols_outcomes")
    outcomes = trial.read("outcomes")
    assert counts.set_index("unit_id").sort_index().equals(outcomes[["pre", "post"]].sort_index())

    meta = _sql(database_url, f"SELECT * FROM {schema}.patrols_trial")
    assert meta.loc[0, "design_fingerprint"] == trial.design_fingerprint
    assert meta.loc[0, "pre_period"] == "2024-01-01/2024-12-31"

    types = _sql(
        database_url,
        "SELECT table_name, column_name, data_type, udt_name FROM information_schema.columns "
        f"WHERE table_schema = '{schema}'",
    ).set_index(["table_name", "column_name"])
    expect = {
        ("patrols_assignment", "unit_id"): "text",
        ("patrols_assignment", "treated"): "boolean",
        ("patrols_assignment", "condition"): "text",
        ("patrols_assignment", "p_treated"): "double precision",
        ("patrols_outcomes", "pre"): "bigint",
        ("patrols_results", "estimate"): "double precision",
        ("patrols_results", "p_value"): "double precision",
        ("patrols_results", "n_units"): "bigint",
        ("patrols_trial", "draw_number"): "bigint",
    }
    for key, data_type in expect.items():
        assert types.loc[key, "data_type"] == data_type, key
    assert types.loc[("patrols_assignment", "geometry"), "udt_name"] == "geometry"


def test_existing_tables_are_kept_unless_replace_is_asked(trials, database_url):
    _, trial = trials
    schema = f"out_{uuid.uuid4().hex[:10]}"
    write_trial_tables(trial, database_url, schema=schema)
    _sql_exec(database_url, f"UPDATE {schema}.results SET finding = 'edited by hand'")
    with pytest.raises(InputError, match="does not write over"):
        write_trial_tables(trial, database_url, schema=schema)
    kept = _sql(database_url, f"SELECT DISTINCT finding FROM {schema}.results")
    assert list(kept["finding"]) == ["edited by hand"]

    refused = CliRunner().invoke(
        app, ["write-tables", str(trial.path), "--to", database_url, "--schema", schema]
    )
    assert refused.exit_code == 2 and "does not write over" in refused.output

    written = write_trial_tables(trial, database_url, schema=schema, replace=True)
    assert f"{schema}.assignment" in written
    fresh = _sql(database_url, f"SELECT finding FROM {schema}.results")
    assert "edited by hand" not in set(fresh["finding"])


def _sql_exec(url, statement):
    import psycopg

    with psycopg.connect(url) as conn:
        conn.execute(statement)
