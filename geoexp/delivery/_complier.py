"""The effect of treatment received: the complier effect with assignment as the instrument.

Assignment is not delivery: some treated places get less presence than
planned and some controls get some. The intention-to-treat (ITT) contrast of
the outcome stays the primary result. Beside it, the complier effect is the
Wald ratio

    beta = ITT on the outcome / ITT on the dose received

(Angrist, Imbens & Rubin 1996): with a binary dose (received the planned
dose or not) it is the average effect on the places that take the treatment
when assigned it and not otherwise; with a dose in minutes it is the effect
per minute of presence, averaged with weights over the places whose presence
assignment moves (Angrist & Imbens 1995). Presence at controls
(contamination) is handled by the ratio itself: the denominator is the
difference in dose between assigned conditions, so contamination lowers it
and the ratio scales the ITT back up. The estimate assumes assignment
changes outcomes only through the dose (exclusion restriction) and never
lowers anybody's dose (monotonicity); neither can be tested here, and
spillover of presence to nearby places breaks the exclusion restriction for
the units in spillover bands, which is why the contrast is between assigned
conditions of the design (treated and pure control by default).

Test: beta = 0 holds exactly when the ITT on the outcome is zero, so the test
of "no complier effect" is the design's randomization test of the ITT
contrast, with the same statistic and the same draws (the Fisher test's
stream). Interval: for each candidate beta, the adjusted outcome
``y - beta * dose`` is the same under every assignment if the effect is beta
for every unit of dose (Imbens & Rosenbaum 2005), so the randomization test
of its ITT contrast is exact; the interval is the set of beta it does not
reject (Anderson & Rubin 1949 in spirit). Because the statistic is linear in
beta for fixed per-draw sums, one pass of the design's draws serves every
candidate. When assignment barely moves the dose (a weak instrument) the set
is honestly wide: it can be unbounded, and is then reported with infinite
ends rather than as a misleading Wald interval.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from geoexp._rng import RngLike, Stream
from geoexp.errors import InputError
from geoexp.exposure import exposure_probabilities
from geoexp.inference import significance

if TYPE_CHECKING:
    from geoexp.design import Design

_GRID = 801


@dataclass(frozen=True)
class ComplierEffect:
    """The complier effect beside the intention-to-treat contrasts it is made of."""

    estimate: float  # beta: outcome units per unit of dose
    ci_low: float
    ci_high: float
    p_value: float  # the randomization test of ITT on the outcome = 0
    mc_error: float
    n_draws: int
    itt_outcome: float
    itt_dose: float
    level: float
    contrast: str
    dose_label: str
    bounded: bool  # False when the test-inversion set reaches the search range's ends
    units_words: str = ""  # the units compared, in words (those of the analysis's row)

    def __str__(self) -> str:
        low = "-inf" if not np.isfinite(self.ci_low) else f"{self.ci_low:.4g}"
        high = "+inf" if not np.isfinite(self.ci_high) else f"{self.ci_high:.4g}"
        return (
            f"Effect of treatment received ({self.contrast}; dose: {self.dose_label})"
            f"{', over ' + self.units_words if self.units_words else ''}:\n"
            f"  ITT on the outcome {self.itt_outcome:.4g} incidents per unit (primary result)\n"
            f"  ITT on the dose {self.itt_dose:.4g} {self.dose_label} per unit\n"
            f"  complier effect {self.estimate:.4g} incidents per {self.dose_label}, "
            f"{self.level:.0%} interval [{low}, {high}] by test inversion, "
            f"p = {self.p_value:.4f} (randomization test of the ITT, {self.n_draws:,} draws, "
            f"Monte Carlo error {self.mc_error:.4f})"
        )

    def to_markdown(self) -> str:
        """A report section: the ITT first (the primary result), the complier effect beside it."""
        low = "-inf" if not np.isfinite(self.ci_low) else f"{self.ci_low:.3g}"
        high = "+inf" if not np.isfinite(self.ci_high) else f"{self.ci_high:.3g}"
        return (
            "## Effect of treatment received\n\n"
            "The intention-to-treat (ITT) result is the primary result; the complier effect "
            "beside it scales it by how much assignment changed the presence delivered "
            "(Angrist, Imbens & Rubin 1996). It assumes assignment changes incidents only "
            "through presence and never lowers presence."
            f"{' Units: ' + self.units_words + '.' if self.units_words else ''}\n\n"
            f"| quantity ({self.contrast}) | value |\n| --- | --- |\n"
            f"| ITT on the outcome (incidents per place) | {self.itt_outcome:.3g} |\n"
            f"| ITT on the dose ({self.dose_label} per place) | {self.itt_dose:.3g} |\n"
            f"| complier effect (incidents per {self.dose_label}) | {self.estimate:.3g} |\n"
            f"| {self.level:.0%} interval, by inverting the randomization test "
            f"(Imbens & Rosenbaum 2005) | [{low}, {high}] |\n"
            f"| p-value, randomization test of the ITT ({self.n_draws:,} draws) | "
            f"{self.p_value:.4f} |\n"
        )

    def to_frame(self) -> pd.DataFrame:
        """One row with every field."""
        return pd.DataFrame([self.__dict__])


def complier_effect(
    design: Design,
    observed: np.ndarray,
    y: np.ndarray,
    dose: np.ndarray,
    probabilities: np.ndarray,
    *,
    treated: int = 0,
    control: int | None = None,
    n_draws: int = 2000,
    rng: RngLike = None,
    level: float = 0.95,
    dose_label: str = "unit of dose",
    units: np.ndarray | None = None,
    units_words: str = "",
) -> ComplierEffect:
    """Complier effect (Wald ratio) with its randomization test and test-inversion interval.

    Parameters
    ----------
    design : geoexp.design.Design
        The trial's design; its sampler gives the randomization distribution.
    observed : numpy.ndarray
        Observed exposure condition code of every unit.
    y : numpy.ndarray
        Outcome per unit (e.g. incidents in the post-period, or the change).
    dose : numpy.ndarray
        Treatment received per unit: 1/0 for "received the planned dose", or
        minutes present.
    probabilities : numpy.ndarray
        (n_units, n_conditions) exposure probabilities of the design.
    treated, control : int
        Condition codes compared; ``control`` defaults to pure control.
    n_draws : int
        Draws of the design for the test and the interval.
    rng : None, int, SeedSequence or Generator
        Default: the design's Fisher-test stream, so the test of beta = 0 is
        the design's randomization test of the ITT.
    level : float
        Confidence level of the interval.
    dose_label : str
        Words for one unit of ``dose`` (e.g. ``"minute present"``), used in the
        result's text: the effect reads as incidents per ``dose_label``.
    units : numpy.ndarray, optional
        Boolean mask of the units compared (default: every unit that can be in
        both conditions). Pass the analysis's row units
        (:func:`geoexp.exposure.contrast_units`, positivity floor included) so
        that the ITT here is the analysis's estimate.
    units_words : str
        Those units in words, for the result's text.

    Returns
    -------
    ComplierEffect
    """
    y = np.asarray(y, dtype=float)
    dose = np.asarray(dose, dtype=float)
    observed = np.asarray(observed)
    n = design.graph.n
    if y.shape != (n,) or dose.shape != (n,) or observed.shape != (n,):
        raise InputError(f"y, dose and observed need one value per unit ({n})")
    if not (np.isfinite(y).all() and np.isfinite(dose).all()):
        raise InputError("y and dose must be finite numbers for every unit")
    if not 0 < level < 1:
        raise InputError(f"level must be between 0 and 1, got {level!r}")
    k = int(treated)
    l = design.mapping.pure_control if control is None else int(control)
    p = np.asarray(probabilities, dtype=float)
    pop = (p[:, k] > 0) & (p[:, l] > 0)
    if units is not None:
        units = np.asarray(units, dtype=bool)
        if units.shape != (n,):
            raise InputError(f"units needs one value per unit ({n})")
        pop &= units
    cols = np.zeros((n, 6))
    cols[pop, 0] = y[pop] / p[pop, k]
    cols[pop, 1] = 1 / p[pop, k]
    cols[pop, 2] = y[pop] / p[pop, l]
    cols[pop, 3] = 1 / p[pop, l]
    cols[pop, 4] = dose[pop] / p[pop, k]
    cols[pop, 5] = dose[pop] / p[pop, l]
    obs_k = cols[observed == k].sum(axis=0)
    obs_l = cols[observed == l].sum(axis=0)
    if obs_k[1] == 0 or obs_l[3] == 0:
        raise InputError("the compared conditions must each hold at least one unit")
    itt_y = obs_k[0] / obs_k[1] - obs_l[2] / obs_l[3]
    itt_d = obs_k[4] / obs_k[1] - obs_l[5] / obs_l[3]
    rng = design.stream(Stream.FISHER_TEST) if rng is None else rng
    sums = exposure_probabilities(
        design.sampler,
        design.graph,
        design.mapping,
        n_draws,
        rng,
        covariates=pd.DataFrame(cols, index=design.graph.ids),
    ).covariate_sums
    assert sums is not None  # covariates were given
    sk, sl = sums[:, k, :], sums[:, l, :]
    with np.errstate(invalid="ignore", divide="ignore"):
        # Hajek contrasts per draw: of the outcome (a) and of the dose (b); stat(beta) = a - beta b.
        a = sk[:, 0] / sk[:, 1] - sl[:, 2] / sl[:, 3]
        b = sk[:, 4] / sk[:, 1] - sl[:, 5] / sl[:, 3]
    p0, mc, _ = significance(itt_y, a, "two-sided")
    beta = itt_y / itt_d if itt_d != 0 else np.nan

    def pvalues(grid: np.ndarray) -> np.ndarray:
        t = np.abs(a[:, None] - grid[None, :] * b[:, None])
        obs = np.abs(itt_y - grid * itt_d)
        tol = 1e-9 * np.maximum(1.0, obs)
        extreme = ((t >= obs - tol) | ~np.isfinite(t)).sum(axis=0)
        return (1 + extreme) / (1 + n_draws)

    # Search range: the ratio's scale from the draws' spread, widened until the set closes.
    spread = np.nanstd(a) / max(abs(itt_d), np.nanstd(b), 1e-12)
    center = beta if np.isfinite(beta) else 0.0
    half = 8 * max(spread, 1e-9, abs(center) * 0.1)
    alpha = 1 - level
    for _ in range(5):
        grid = np.linspace(center - half, center + half, _GRID)
        inside = pvalues(grid) > alpha
        if not (inside[0] or inside[-1]):
            break
        half *= 4
    bounded = not (inside[0] or inside[-1])
    if not inside.any():
        low = high = np.nan
    else:
        idx = np.flatnonzero(inside)
        step = grid[1] - grid[0]
        # Refine each end between the last accepted and first rejected grid points.
        low = -np.inf if inside[0] else _edge(pvalues, grid[idx[0]], grid[idx[0]] - step, alpha)
        high = np.inf if inside[-1] else _edge(pvalues, grid[idx[-1]], grid[idx[-1]] + step, alpha)
    return ComplierEffect(
        estimate=float(beta),
        ci_low=float(low),
        ci_high=float(high),
        p_value=float(p0),
        mc_error=float(mc),
        n_draws=int(n_draws),
        itt_outcome=float(itt_y),
        itt_dose=float(itt_d),
        level=float(level),
        contrast=f"{design.mapping.labels[k]} vs {design.mapping.labels[l]}",
        dose_label=dose_label,
        bounded=bounded,
        units_words=units_words,
    )


def _edge(pvalues, accepted: float, rejected: float, alpha: float) -> float:
    """The boundary of the accepted set between two grid points, by bisection (40 halvings)."""
    for _ in range(40):
        mid = (accepted + rejected) / 2
        if pvalues(np.array([mid]))[0] > alpha:
            accepted = mid
        else:
            rejected = mid
    return float(accepted)
