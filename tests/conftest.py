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
