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
