"""Plain-language verdicts, one per contrast row, from the tests over the row's own units."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from geoexp.estimate import ContrastEstimate, Estimand
from geoexp.inference import InvertedTest, RandomizationTest

# Both sides need at least this Kish effective sample size before the normal-approximation
# interval (Aronow & Samii 2017 variance) is shown beside a direct effect. Below it the
# approximation undercovers (83% coverage seen in a trial with 6 treated units); on
# spillover rows the conservative variance is 1.8-3.3 times the estimate's spread on the
# sample city, so the approximate interval is not shown there at all.
MIN_ESS_APPROXIMATION = 30  # common practice (about 30 units per side for a normal approximation)


@dataclass(frozen=True)
class Verdict:
    """What one contrast row says, in words, with the numbers behind it.

    ``ci_low`` and ``ci_high`` are the interval printed beside the verdict: the
    inversion of the very test whose p-value is ``p_value``, over the same
    units. ``percent_of_reference`` is 100 (rate ratio - 1): the post-period
    change relative to what the same units would have had, on one scale.
    ``reason`` says why the verdict is "inconclusive" when it is.
    """

    contrast: str
    finding: str
    estimate: float
    ci_low: float
    ci_high: float
    percent_of_reference: float
    p_value: float
    test: str
    sentence: str
    reason: str = ""


def format_p(p: float, n_draws: int, alternative: str = "two-sided") -> str:
    """``p = 0.023``, or ``p = 0.001, the smallest possible with 2000 draws``.

    The smallest possible p-value is 1/(R + 1) one-sided and 2/(R + 1) for the
    equal-tailed two-sided rule.
    """
    if not np.isfinite(p):
        return "p not available"
    smallest = (2 if alternative == "two-sided" else 1) / (n_draws + 1)
    if p <= smallest * (1 + 1e-9):
        return f"p = {p:.2g}, the smallest possible with {n_draws} draws"
    return f"p = {p:.3f}" if p >= 0.001 else f"p = {p:.2g}"


def approximation_supported(effect: ContrastEstimate, direct: bool) -> bool:
    """Whether the normal-approximation interval is shown for this row (see the module note)."""
    ess = min(effect.ess_exposure, effect.ess_reference)
    return bool(direct and np.isfinite(ess) and ess >= MIN_ESS_APPROXIMATION)


def _clear(test: RandomizationTest | None, alpha: float) -> bool | None:
    if test is None or not np.isfinite(test.p_value):
        return None
    return bool(test.p_value <= alpha)


def row_verdict(
    estimand: Estimand,
    effect: ContrastEstimate,
    additive: InvertedTest,
    *,
    alpha: float,
    unit: str,
    direct: bool,
    rate: InvertedTest | None = None,
    exact: RandomizationTest | None = None,
    show_approximation: bool = False,
    sensitivity: str = "",
) -> Verdict:
    """One verdict for a contrast row, from the tests over the row's own units.

    The deciding test is the randomization test of no additive effect on the
    row's units (Fisher 1935; its inversion gives the interval printed beside
    it, Rosenbaum 2002). The other methods computed over the same units are
    the exact conditional test of no spillover (Athey, Eckles & Imbens 2018;
    spillover rows), the test of a rate ratio of 1 on post-period counts, and
    the normal approximation where it is shown. When any of them disagrees
    with the deciding test about whether there is an effect, or points the
    other way, the verdict is "inconclusive" and says why. The direction
    follows the sign convention tau = exposed - reference: negative is fewer
    incidents (a reduction, or diffusion of benefits next door), positive is
    more (an increase, or displacement).
    """
    rejects = _clear(additive.test, alpha)
    est = effect.estimate
    reasons = []
    name = "randomization test of no additive effect"
    if exact is not None:
        e = _clear(exact, alpha)
        if e is not None and rejects is not None and e != rejects:
            reasons.append(
                f"the exact conditional test of no spillover on the same units "
                f"{'rejects' if e else 'does not reject'} "
                f"({format_p(exact.p_value, exact.n_draws, exact.alternative)}) while the "
                f"{name} {'rejects' if rejects else 'does not'}"
            )
    if rate is not None:
        r = _clear(rate.test, alpha)
        if r is not None and rejects is not None and r != rejects:
            reasons.append(
                f"the rate-ratio test on post-period counts "
                f"{'rejects' if r else 'does not reject'} a ratio of 1 while the {name} on "
                f"{effect.outcome} {'rejects' if rejects else 'does not'}"
            )
        elif r and rejects and np.isfinite(rate.estimate) and (rate.estimate < 1) != (est < 0):
            reasons.append("the rate ratio and the additive estimate point in opposite directions")
    if show_approximation and rejects is not None:
        a = effect.ci_low > 0 or effect.ci_high < 0
        if a != rejects:
            reasons.append(
                "the normal approximation "
                f"{'excludes' if a else 'includes'} 0 while the randomization test "
                f"{'rejects' if rejects else 'does not'}"
            )
    if not additive.connected:
        reasons.append("the effects the test does not reject do not form one interval")
    band = estimand.exposure_label
    if rejects is None:
        finding = "inconclusive"
        reasons.append("the test could not be computed (an empty condition)")
    elif reasons:
        finding = "inconclusive"
    elif rejects and direct:
        finding = "reduction" if est < 0 else "increase"
    elif rejects:
        finding = "diffusion of benefits" if est < 0 else "displacement"
    else:
        finding = "no detectable effect" if direct else "no detectable spillover"
    if direct:
        lead = f"Treated units, {finding}"
    elif finding == "displacement":
        lead = f"Displacement into the {band} band: more incidents than at pure controls"
    elif finding == "diffusion of benefits":
        lead = f"Diffusion of benefits into the {band} band: fewer incidents than at pure controls"
    elif finding == "no detectable spillover":
        lead = f"No detectable spillover in the {band} band (which is not proof that there is none)"
    else:
        lead = f"{estimand.contrast}: inconclusive"
    level = int(round(100 * additive.level))
    parts = [
        f"units: {estimand.who}",
        f"estimate {est:+.2f} {unit} per unit ({effect.outcome})",
    ]
    if np.isfinite(additive.ci_low) or np.isfinite(additive.ci_high):
        parts.append(
            f"{level}% interval {additive.ci_low:+.2f} to {additive.ci_high:+.2f} by inverting "
            f"the same randomization test, "
            f"{format_p(additive.test.p_value, additive.test.n_draws, additive.test.alternative)}"
        )
    else:
        parts.append(
            f"{name}: "
            f"{format_p(additive.test.p_value, additive.test.n_draws, additive.test.alternative)}"
        )
    pct = float("nan")
    if rate is not None and np.isfinite(rate.estimate):
        pct = 100 * (rate.estimate - 1)
        ci = (
            f", {level}% interval {rate.ci_low:.2f} to {rate.ci_high:.2f}"
            if np.isfinite(rate.ci_low) or np.isfinite(rate.ci_high)
            else ""
        )
        parts.append(
            f"rate ratio {rate.estimate:.2f} in the post-period against what the same units "
            f"would have had, each side against its own pre-period ({pct:+.0f}%{ci}, "
            f"{format_p(rate.test.p_value, rate.test.n_draws, rate.test.alternative)})"
        )
    if exact is not None:
        parts.append(
            "exact conditional test of no spillover on these units: "
            f"{format_p(exact.p_value, exact.n_draws, exact.alternative)}"
        )
    if show_approximation:
        parts.append(
            f"normal approximation {effect.ci_low:+.2f} to {effect.ci_high:+.2f} (an "
            "approximation with the conservative variance of Aronow & Samii 2017; it can "
            "miscover in small trials)"
        )
    if sensitivity:
        parts.append(f"sensitivity: {sensitivity}")
    sentence = f"{lead}: " + "; ".join(parts) + "."
    if reasons:
        sentence += " Inconclusive because " + "; and ".join(reasons) + "."
    return Verdict(
        contrast=estimand.contrast,
        finding=finding,
        estimate=est,
        ci_low=additive.ci_low,
        ci_high=additive.ci_high,
        percent_of_reference=pct,
        p_value=additive.test.p_value,
        test=f"{name} over {estimand.who}",
        sentence=sentence,
        reason="; ".join(reasons),
    )
