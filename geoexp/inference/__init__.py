"""Randomization-based inference with the design's own sampler.

One significance routine (:func:`significance`) serves every test: Fisher's
test of the sharp null of no effect at all, the conditional test of no
spillover on focal units (Athey, Eckles & Imbens 2018), and intervals for a
constant additive effect or rate ratio by test inversion. Tests that draw the
whole design can share one set of draws (:class:`SharedDraws`), which is how
the analysis runs them. Moran's I (Moran 1950; Cliff &
Ord 1981) of a variable over the exposure graph is here too, with the other
statistics.
"""

from geoexp._moran import MoranResult, moran
from geoexp._significance import ALTERNATIVES, Alternative, RandomizationTest, significance
from geoexp.inference._conditional import (
    MIN_FOCAL,
    FixedFocalSampler,
    default_focal_units,
    spillover_test,
)
from geoexp.inference._draws import ContrastSpec
from geoexp.inference._fisher import fisher_test
from geoexp.inference._inversion import (
    constant_effect_test,
    constant_effect_tests,
    invert_constant_effect,
    rate_ratio_test,
    rate_ratio_tests,
)
from geoexp.inference._models import InvertedTest
from geoexp.inference._shared import MAX_COLUMN_BYTES, Pending, SharedDraws
from geoexp.inference._statistic import contrast_statistic

__all__ = [
    "ALTERNATIVES",
    "MAX_COLUMN_BYTES",
    "MIN_FOCAL",
    "Alternative",
    "ContrastSpec",
    "FixedFocalSampler",
    "InvertedTest",
    "MoranResult",
    "Pending",
    "RandomizationTest",
    "SharedDraws",
    "contrast_statistic",
    "default_focal_units",
    "fisher_test",
    "invert_constant_effect",
    "moran",
    "significance",
    "spillover_test",
    "constant_effect_test",
    "constant_effect_tests",
    "rate_ratio_test",
    "rate_ratio_tests",
]
