"""geoexp: plan and analyse randomized field trials over street segments and parcels.

The public objects, in the order the job uses them:

- :class:`geoexp.units.UnitSet` — a validated, projected layer of units;
- :class:`geoexp.graph.ExposureGraph` — pairs of units within a distance;
- :class:`geoexp.design.DesignSpec` and :class:`geoexp.design.Design` — the
  design and its sampler;
- :class:`geoexp.exposure.ExposureMapping` and
  :func:`geoexp.exposure.exposure_probabilities` — conditions and their
  probabilities;
- :func:`geoexp.power.simulate_power` — power by simulation, before the trial;
- :mod:`geoexp.trialfile` — the trial's GeoPackage;
- :func:`geoexp.outcomes.count_incidents` and :func:`geoexp.analysis.analyse` —
  after the trial: counts, effects, randomization tests, verdicts.

geoexp supports, but does not replace, ethics review, legal advice, community
consultation and the judgement of the agencies involved; local law governs.
"""

from importlib import import_module, metadata
from typing import Any


def _installed_version() -> str:
    # the version the package was installed as; a plain source checkout has no metadata
    try:
        return metadata.version("geoexp")
    except metadata.PackageNotFoundError:
        return "0.1.0"


__version__ = _installed_version()

_PUBLIC = {
    "UnitSet": "geoexp.units",
    "ExposureGraph": "geoexp.graph",
    "DesignSpec": "geoexp.design",
    "Design": "geoexp.design",
    "ExposureMapping": "geoexp.exposure",
    "exposure_probabilities": "geoexp.exposure",
    "TrialFile": "geoexp.trialfile",
    "count_incidents": "geoexp.outcomes",
    "analyse": "geoexp.analysis",
    "simulate_power": "geoexp.power",
    "load_sample_region": "geoexp.sampleregion",
}

__all__ = [*_PUBLIC, "__version__"]


def __getattr__(name: str) -> Any:
    # Lazy, so that `import geoexp` stays fast and the command line starts quickly.
    if name in _PUBLIC:
        return getattr(import_module(_PUBLIC[name]), name)
    raise AttributeError(f"module 'geoexp' has no attribute {name!r}")
