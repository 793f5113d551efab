"""Shared fixtures: the invented sample city, loaded once per test session."""

from __future__ import annotations

import os

import matplotlib
import pytest

matplotlib.use("Agg")
os.environ.setdefault("MPLBACKEND", "Agg")


@pytest.fixture(scope="session")
def region():
    """The shipped sample city Quillmere."""
    from geoexp.sampleregion import load_sample_region

    return load_sample_region()


@pytest.fixture(scope="session")
def region_path(region):
    """Path of the shipped sample city GeoPackage."""
    assert region.path is not None, "the shipped sample_regions/quillmere.gpkg is missing"
    return region.path


@pytest.fixture(scope="session")
def demo_outputs(tmp_path_factory):
    """The README's demo job, run once per session (few Monte Carlo draws); its output paths.

    Tests read these files; a test that changes one must copy it first.
    """
    from geoexp.quickstart import run_demo

    out = tmp_path_factory.mktemp("demo")
    paths = run_demo(out, n_draws=200, echo=lambda *_: None)
    paths["dir"] = out
    return paths


@pytest.fixture(scope="module")
def demo(demo_outputs):
    """The folder of the session's demo run (a drawn trial of the sample city); read only."""
    return demo_outputs["dir"]


@pytest.fixture(scope="module")
def trial(demo):
    """The demo's trial file, opened once per test module."""
    from geoexp.trialfile import TrialFile

    return TrialFile.open(demo / "trial.gpkg")


DATABASE_URL_VARIABLE = "GEOEXP_TEST_DATABASE_URL"
DATABASE_OPT_OUT_VARIABLE = "GEOEXP_SKIP_DATABASE_TESTS"


@pytest.fixture(scope="session")
def database_url():
    """URL of a PostgreSQL database with PostGIS for the database tests.

    Without one the tests fail with directions, unless the developer opted out
    with GEOEXP_SKIP_DATABASE_TESTS=1 (then they skip, with that reason shown).
    """
    url = os.environ.get(DATABASE_URL_VARIABLE, "").strip()
    if url:
        return url
    if os.environ.get(DATABASE_OPT_OUT_VARIABLE) == "1" and os.environ.get("CI") != "true":
        pytest.skip(f"database tests skipped: {DATABASE_OPT_OUT_VARIABLE}=1 was set")
    pytest.fail(
        f"the database tests need PostgreSQL with PostGIS: set {DATABASE_URL_VARIABLE}, e.g. "
        'start a throwaway cluster with  eval "$(bash .ci/test-database start)"  (Debian '
        "packages postgresql and postgresql-postgis), or opt out locally with "
        f"{DATABASE_OPT_OUT_VARIABLE}=1",
        pytrace=False,
    )


@pytest.fixture(scope="session")
def city_db(database_url, region):
    """The sample city's segments, parcels and incidents in a fresh schema; (url, schema)."""
    import uuid

    import sqlalchemy

    schema = f"city_{uuid.uuid4().hex[:10]}"
    # SQLAlchemy's own URL form, as an agency's script would write it (psycopg driver)
    engine = sqlalchemy.create_engine(
        database_url.replace("postgresql://", "postgresql+psycopg://", 1)
    )
    with engine.begin() as conn:
        conn.execute(sqlalchemy.text(f"CREATE SCHEMA {schema}"))
    region.segments.to_postgis("segments", engine, schema=schema)
    region.parcels.to_postgis("parcels", engine, schema=schema)
    incidents = region.incidents.rename_geometry("geom")
    incidents["date"] = incidents["date"].dt.date  # a SQL date column, as agencies keep them
    incidents.to_postgis("incidents", engine, schema=schema)
    with engine.begin() as conn:
        conn.execute(sqlalchemy.text(f"CREATE INDEX ON {schema}.segments USING gist (geometry)"))
    yield database_url, schema
    with engine.begin() as conn:
        conn.execute(sqlalchemy.text(f"DROP SCHEMA {schema} CASCADE"))
    engine.dispose()
