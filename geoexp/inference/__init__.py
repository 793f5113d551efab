"""Randomization-based inference with the design's own sampler.

One significance routine (:func:`significance`) serves every test: Fisher's
test of the sharp null of no effect at all, the conditional test of no
spillover on focal units (Athey, Eckles & Imbens 2018), and intervals for a
constant additive effect by test inversion. Moran's I (Moran 1950; Cliff &
Ord 1981) of a variable over the exposure graph is here too, with the other
statistics.
"""

from geoexp.inference._conditional import FixedFocalSampler, default_focal_units, spillover_test
from geoexp.inference._draws import ContrastSpec
from geoexp.inference._fisher import fisher_test
from geoexp.inference._inversion import invert_constant_effect
from geoexp.inference._moran import MoranResult, moran
from geoexp.inference._significance import RandomizationTest, significance

__all__ = [
    "ContrastSpec",
    "FixedFocalSampler",
    "MoranResult",
    "RandomizationTest",
    "default_focal_units",
    "fisher_test",
    "invert_constant_effect",
    "moran",
    "significance",
    "spillover_test",
]
