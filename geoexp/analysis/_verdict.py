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


def _numbers(
    effect: ContrastEstimate,
    pct: float,
    unit: str,
    inverted: tuple[float, float] | None,
    test: RandomizationTest | None,
    how: str,
) -> str:
    level = int(round(100 * effect.level))
    parts = [
        f"estimate {effect.estimate:+.2f} {unit} per unit ({pct:+.0f}% of the pure-control mean)",
        f"{level}% interval {effect.ci_low:+.2f} to {effect.ci_high:+.2f} (conservative variance)",
    ]
    if inverted is not None and np.all(np.isfinite(inverted)):
        parts.append(f"{inverted[0]:+.2f} to {inverted[1]:+.2f} by inverting randomization tests")
    if test is not None:
        parts.append(f"{format_p(test.p_value, test.n_draws, test.alternative)} ({how})")
    return "; ".join(parts) + "."


def spillover_verdict(
    effect: ContrastEstimate,
    test: RandomizationTest | None,
    alpha: float,
    unit: str,
    reference_level: float,
    inverted: tuple[float, float] | None = None,
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
        p, how = test.p_value, "conditional randomization test of no spillover, focal units"
    else:
        significant = effect.ci_low > 0 or effect.ci_high < 0
        p, how = float("nan"), "interval (no focal units for an exact test)"
    band = effect.exposure
    if significant and effect.estimate > 0:
        finding = "displacement"
        lead = f"Displacement into the {band} band: more incidents than at pure controls"
    elif significant and effect.estimate < 0:
        finding = "diffusion of benefits"
        lead = f"Diffusion of benefits into the {band} band: fewer incidents than at pure controls"
    else:
        finding = "no detectable spillover"
        lead = f"No detectable spillover in the {band} band (which is not proof that there is none)"
    words = f"{lead}: {_numbers(effect, pct, unit, inverted, test, how)}"
    return Verdict(
        effect.contrast, finding, effect.estimate, effect.ci_low, effect.ci_high, pct, p, how, words
    )


def direct_verdict(
    effect: ContrastEstimate,
    test: RandomizationTest | None,
    alpha: float,
    unit: str,
    reference_level: float,
    inverted: tuple[float, float] | None = None,
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
    how = "Fisher randomization test of no effect at all"
    words = f"Treated units, {finding}: {_numbers(effect, pct, unit, inverted, test, how)}"
    return Verdict(
        effect.contrast, finding, effect.estimate, effect.ci_low, effect.ci_high, pct, p, how, words
    )


def format_p(p: float, n_draws: int, alternative: str = "two-sided") -> str:
    """``p = 0.023``, or ``p = 0.001, the smallest possible with 2000 draws``.

    The smallest possible p-value is 1/(R + 1) one-sided and 2/(R + 1) for the
    equal-tailed two-sided rule.
    """
    smallest = (2 if alternative == "two-sided" else 1) / (n_draws + 1)
    if p <= smallest * (1 + 1e-9):
        return f"p = {p:.2g}, the smallest possible with {n_draws} draws"
    return f"p = {p:.3f}" if p >= 0.001 else f"p = {p:.2g}"


def _percent(estimate: float, reference_level: float) -> float:
    """The estimate as a percentage of the pure-control mean post-period count."""
    ok = np.isfinite(reference_level) and reference_level != 0
    return 100 * estimate / reference_level if ok else float("nan")
