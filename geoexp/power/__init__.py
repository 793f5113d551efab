"""Power by simulation and design comparison, before a trial starts.

Simulated trials draw assignments from the design's own sampler and outcomes
from an outcome model (negative binomial counts or normal outcomes with
effects per exposure condition), and run the tests the analysis runs.
"""

from geoexp.power._curve import TARGET_POWER, PowerCurve, power_curve, underpowered
from geoexp.power._formulas import negative_binomial_sample_size
from geoexp.power._models import NegativeBinomialOutcome, NormalOutcome, OutcomeModel
from geoexp.power._simulate import ContrastPower, PowerResult, compare_designs, simulate_power

__all__ = [
    "TARGET_POWER",
    "PowerCurve",
    "power_curve",
    "underpowered",
    "ContrastPower",
    "NegativeBinomialOutcome",
    "NormalOutcome",
    "OutcomeModel",
    "PowerResult",
    "compare_designs",
    "negative_binomial_sample_size",
    "simulate_power",
]
