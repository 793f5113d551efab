"""Exposure conditions and their probabilities under a design.

An exposure mapping gives each unit one condition under an assignment:
treated, spillover band k (the nearest treated unit lies in band k), or pure
control. The design's own sampler is drawn many times to estimate every unit's
probability of every condition, with Monte Carlo errors, and the joint
probabilities that the variance estimators of the analysis need (Aronow &
Samii 2017).
"""

from geoexp.exposure._estimand import DEFAULT_FLOOR, Estimand, contrast_units, kish_ess
from geoexp.exposure._joint import (
    ConditionBits,
    ConditionIndicators,
    condition_bits,
    condition_indicators,
    dependence_pairs,
    unpack_bits,
)
from geoexp.exposure._mapping import ExposureMapping
from geoexp.exposure._probabilities import (
    ContrastPositivity,
    ExposureProbabilities,
    PositivityReport,
    assign_conditions,
    condition_sums,
    exposure_probabilities,
)
from geoexp.exposure._reach import BandedReach, band_codes

__all__ = [
    "DEFAULT_FLOOR",
    "Estimand",
    "contrast_units",
    "kish_ess",
    "BandedReach",
    "band_codes",
    "condition_sums",
    "ConditionBits",
    "condition_bits",
    "dependence_pairs",
    "ConditionIndicators",
    "ContrastPositivity",
    "ExposureMapping",
    "ExposureProbabilities",
    "PositivityReport",
    "assign_conditions",
    "condition_indicators",
    "exposure_probabilities",
    "unpack_bits",
]
