"""Regenerate sample_regions/quillmere.gpkg: ``python sample_regions/make_quillmere.py``."""

from pathlib import Path

from geoexp.sampleregion import make_city, write_sample_region

region = make_city()  # the default seed is the one the shipped file was made with
path = write_sample_region(region, Path(__file__).resolve().parent / "quillmere.gpkg")
print(f"wrote {path}: {region}")
