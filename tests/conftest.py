"""Shared fixtures: the invented sample city, loaded once per test session."""

from __future__ import annotations

import os
import shlex
import subprocess
from pathlib import Path

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

    Order: the URL in GEOEXP_TEST_DATABASE_URL; else a throwaway cluster started
    for this session with ``.ci/test-database`` when PostgreSQL and PostGIS are
    installed (stopped and deleted at the end); else, like the browser tests,
    the tests skip with the reason outside CI and fail in CI (``CI=true``).
    GEOEXP_SKIP_DATABASE_TESTS=1 skips them outside CI without trying.
    """
    url = os.environ.get(DATABASE_URL_VARIABLE, "").strip()
    if url:
        yield url
        return
    in_ci = os.environ.get("CI") == "true"
    if os.environ.get(DATABASE_OPT_OUT_VARIABLE) == "1" and not in_ci:
        pytest.skip(f"database tests skipped: {DATABASE_OPT_OUT_VARIABLE}=1 was set")
    script = Path(__file__).resolve().parents[1] / ".ci" / "test-database"
    started = subprocess.run(
        ["bash", str(script), "start"], capture_output=True, text=True, check=False
    )
    values = dict(
        line.removeprefix("export ").split("=", 1)
        for line in started.stdout.splitlines()
        if line.startswith("export ") and "=" in line
    )
    values = {k: shlex.split(v)[0] if v else v for k, v in values.items()}
    if started.returncode == 0 and values.get(DATABASE_URL_VARIABLE):
        try:
            yield values[DATABASE_URL_VARIABLE]
        finally:
            subprocess.run(
                ["bash", str(script), "stop", values.get("GEOEXP_TEST_DATABASE_DIR", "")],
                capture_output=True,
                check=False,
            )
        return
    reason = (
        "the database tests need PostgreSQL with PostGIS (Debian packages postgresql and "
        f"postgresql-postgis) or {DATABASE_URL_VARIABLE}; starting a throwaway cluster "
        f"failed: {started.stderr.strip()[-300:]}"
    )
    if in_ci:
        pytest.fail(reason, pytrace=False)
    pytest.skip(reason)


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
