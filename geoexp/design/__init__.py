"""Randomized designs over geographic units.

A design is a TOML spec plus a seed (:class:`DesignSpec`), resolved against its
unit layer into a :class:`Design` that holds the eligible units, the exposure
graph and a sampler: a definite random procedure that can be drawn again and
again. Samplers: complete randomization, blocked (stratified) randomization,
kept-apart designs (no two treated units within a gap), randomized-saturation
designs (Baird, Bohren, McIntosh & Özler 2018), rerandomization for balance
(Morgan & Rubin 2012), and a floor on pure controls. The probabilities of each
design are whatever its procedure implies, estimated by Monte Carlo from the
same sampler. A spec is a pure value; :func:`units_for`, :func:`eligible_for`
and :func:`build_sampler` resolve it, one sampler builder per method
(:data:`SAMPLER_BUILDERS`), each giving a :class:`Sampler`.
"""

from geoexp.design._assignment import Assignment
from geoexp.design._build import SAMPLER_BUILDERS, build_sampler, eligible_for, units_for
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
from geoexp.design._flow import FlowStep, UnitFlow, unit_flow, unit_flow_of
from geoexp.design._limits import MAX_DRAWS, check_draws, memory_cap_bytes, monte_carlo_bytes
from geoexp.design._network_check import network_check, refuse_sparse_network
from geoexp.design._protocol import Sampler, fixed_treated
from geoexp.design._samplers import (
    BlockedSampler,
    CompleteSampler,
    Rerandomized,
    SaturationSampler,
    SeparatedSampler,
)
from geoexp.design._schema import SCHEMA as SPEC_KEYS
from geoexp.design._schema import choice as check_choice
from geoexp.design._schema import listing as check_list
from geoexp.design._schema import real as check_real
from geoexp.design._schema import text as check_text
from geoexp.design._schema import whole as check_whole
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
    "network_check",
    "refuse_sparse_network",
    "MAX_DRAWS",
    "SAMPLER_BUILDERS",
    "SPEC_KEYS",
    "check_choice",
    "check_list",
    "check_real",
    "check_text",
    "check_whole",
    "Sampler",
    "build_sampler",
    "check_draws",
    "unit_flow",
    "unit_flow_of",
    "FlowStep",
    "UnitFlow",
    "eligible_for",
    "fixed_treated",
    "memory_cap_bytes",
    "monte_carlo_bytes",
    "units_for",
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
