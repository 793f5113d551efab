"""Plain-language verdicts: displacement, diffusion of benefits, or no detectable spillover."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from geoexp.estimate import ContrastEstimate
from geoexp.inference import RandomizationTest


@dataclass(frozen=True)
class Verdict:
    """What one contrast says, in words, with the numbers behind it."""

    contrast: str
    finding: str
    estimate: float
    ci_low: float
    ci_high: float
    percent_of_reference: float
    p_value: float
    test: str
    sentence: str


def spillover_verdict(
    effect: ContrastEstimate,
    test: RandomizationTest | None,
    alpha: float,
    unit: str,
    reference_level: float,
) -> Verdict:
    """Displacement (more incidents next door), diffusion of benefits (fewer), or neither.

    The decision uses the exact conditional test of no spillover when it could
    be run (Athey, Eckles & Imbens 2018), otherwise whether the interval
    excludes zero; the direction is the sign of the estimate (positive is
    displacement, by the sign convention tau = exposed - pure control).
    """
    pct = _percent(effect.estimate, reference_level)
    if test is not None:
        significant = test.p_value <= alpha
        p, how = test.p_value, "conditional randomization test on focal units"
    else:
        significant = effect.ci_low > 0 or effect.ci_high < 0
        p, how = float("nan"), "interval (no focal units for an exact test)"
    band = effect.exposure
    if significant and effect.estimate > 0:
        finding = "displacement"
        words = (
            f"Displacement in the {band} band: about {effect.estimate:+.2f} {unit} per unit "
            f"({pct:+.0f}% of the pure-control mean) compared with pure controls, interval "
            f"{effect.ci_low:+.2f} to {effect.ci_high:+.2f}."
        )
    elif significant and effect.estimate < 0:
        finding = "diffusion of benefits"
        words = (
            f"Diffusion of benefits into the {band} band: about {effect.estimate:+.2f} {unit} per "
            f"unit ({pct:+.0f}% of the pure-control mean) compared with pure controls, interval "
            f"{effect.ci_low:+.2f} to {effect.ci_high:+.2f}."
        )
    else:
        finding = "no detectable spillover"
        words = (
            f"No detectable spillover in the {band} band: the estimate is {effect.estimate:+.2f} "
            f"{unit} per unit ({pct:+.0f}%), with an interval from {effect.ci_low:+.2f} to "
            f"{effect.ci_high:+.2f} that includes no change; this is not proof that there is none."
        )
    if test is not None:
        words += f" (p = {p:.3f}, {how})"
    return Verdict(
        effect.contrast, finding, effect.estimate, effect.ci_low, effect.ci_high, pct, p, how, words
    )


def direct_verdict(
    effect: ContrastEstimate,
    test: RandomizationTest | None,
    alpha: float,
    unit: str,
    reference_level: float,
) -> Verdict:
    """Reduction, increase or no detectable effect on the treated units."""
    pct = _percent(effect.estimate, reference_level)
    p = test.p_value if test is not None else float("nan")
    significant = (p <= alpha) if test is not None else (effect.ci_low > 0 or effect.ci_high < 0)
    if significant and effect.estimate < 0:
        finding = "reduction"
    elif significant and effect.estimate > 0:
        finding = "increase"
    else:
        finding = "no detectable effect"
    words = (
        f"Treated units: {finding}, {effect.estimate:+.2f} {unit} per unit ({pct:+.0f}% of the "
        f"pure-control mean), interval {effect.ci_low:+.2f} to {effect.ci_high:+.2f}"
        + (f", p = {p:.3f} (Fisher randomization test of no effect at all)." if test else ".")
    )
    return Verdict(
        effect.contrast,
        finding,
        effect.estimate,
        effect.ci_low,
        effect.ci_high,
        pct,
        p,
        "Fisher randomization test",
        words,
    )


def _percent(estimate: float, reference_level: float) -> float:
    """The estimate as a percentage of the pure-control mean post-period count."""
    ok = np.isfinite(reference_level) and reference_level != 0
    return 100 * estimate / reference_level if ok else float("nan")
