"""Randomization-based inference with the design's own sampler.

One significance routine (:func:`significance`) serves every test: Fisher's
test of the sharp null of no effect at all, the conditional test of no
spillover on focal units (Athey, Eckles & Imbens 2018), and intervals for a
constant additive effect by test inversion.
"""

from geoexp.inference._conditional import FixedFocalSampler, default_focal_units, spillover_test
from geoexp.inference._draws import ContrastSpec
from geoexp.inference._fisher import fisher_test
from geoexp.inference._inversion import (
    InvertedTest,
    constant_effect_test,
    invert_constant_effect,
    rate_ratio_test,
)
from geoexp.inference._significance import RandomizationTest, significance
from geoexp.inference._statistic import contrast_statistic

__all__ = [
    "ContrastSpec",
    "FixedFocalSampler",
    "InvertedTest",
    "RandomizationTest",
    "contrast_statistic",
    "default_focal_units",
    "fisher_test",
    "invert_constant_effect",
    "significance",
    "spillover_test",
    "constant_effect_test",
    "rate_ratio_test",
]
