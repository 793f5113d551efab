"""Estimates of direct and spillover effects, and displacement indices.

Horvitz–Thompson and Hajek estimators of exposure contrasts with the
conservative variance of Aronow & Samii (2017); the difference in means with
Neyman's variance for designs without interference; the weighted displacement
quotient of Bowers & Johnson (2003).
"""

from geoexp.estimate._adjusted import adjusted_contrast
from geoexp.estimate._displacement import DisplacementIndex, weighted_displacement_quotient
from geoexp.estimate._horvitz import (
    DENSE_LIMIT,
    ContrastEstimate,
    estimate_contrast,
    estimate_contrasts,
)
from geoexp.estimate._neyman import difference_in_means
from geoexp.estimate._saturation import saturation_effects
from geoexp.exposure import DEFAULT_FLOOR, Estimand, contrast_units, kish_ess

__all__ = [
    "DEFAULT_FLOOR",
    "DENSE_LIMIT",
    "ContrastEstimate",
    "Estimand",
    "adjusted_contrast",
    "contrast_units",
    "kish_ess",
    "DisplacementIndex",
    "difference_in_means",
    "estimate_contrast",
    "estimate_contrasts",
    "saturation_effects",
    "weighted_displacement_quotient",
]
