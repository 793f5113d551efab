"""Randomized designs over geographic units.

A design is a TOML spec plus a seed (:class:`DesignSpec`), resolved against its
unit layer into a :class:`Design` that holds the eligible units, the exposure
graph and a sampler: a definite random procedure that can be drawn again and
again. Samplers: complete randomization, blocked (stratified) randomization,
kept-apart designs (no two treated units within a gap), randomized-saturation
designs (Baird, Bohren, McIntosh & Özler 2018), rerandomization for balance
(Morgan & Rubin 2012), and a floor on pure controls. The probabilities of each
design are whatever its procedure implies, estimated by Monte Carlo from the
same sampler.
"""

from geoexp.design._assignment import Assignment
from geoexp.design._check import DesignCheck, check_design
from geoexp.design._design import Design
from geoexp.design._draws import Draws
from geoexp.design._fingerprint import (
    DesignFingerprint,
    design_fingerprint,
    frame_digest,
    spec_identity,
    tool_version,
    unit_digests,
    used_columns,
    zone_digest,
)
from geoexp.design._floor import PureControlFloor
from geoexp.design._samplers import (
    BlockedSampler,
    CompleteSampler,
    Rerandomized,
    SaturationSampler,
    SeparatedSampler,
)
from geoexp.design._spec import (
    AssignmentSpec,
    DesignSpec,
    EligibilitySpec,
    ExposureSpec,
    FieldSpec,
    RerandomizeSpec,
    UnitsSpec,
)

__all__ = [
    "Assignment",
    "AssignmentSpec",
    "EligibilitySpec",
    "ExposureSpec",
    "FieldSpec",
    "RerandomizeSpec",
    "UnitsSpec",
    "BlockedSampler",
    "CompleteSampler",
    "Design",
    "DesignCheck",
    "DesignFingerprint",
    "DesignSpec",
    "Draws",
    "PureControlFloor",
    "Rerandomized",
    "SaturationSampler",
    "SeparatedSampler",
    "check_design",
    "design_fingerprint",
    "frame_digest",
    "spec_identity",
    "tool_version",
    "unit_digests",
    "used_columns",
    "zone_digest",
]
