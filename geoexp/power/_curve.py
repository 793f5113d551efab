"""Power curves: power of the direct-effect test against the effect size and the number treated.

Every point is one run of :func:`geoexp.power.simulate_power` on the design
itself (for another number treated, the same spec with only ``treated``
changed), with the same seed at every point, so the curve is smooth in the
effect size and the point at the design's own number treated and effect is the
very run :func:`simulate_power` gives for them. The minimum detectable effect
and the required number treated are read off the simulated grid by linear
interpolation between neighbouring points, and say so.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from geoexp.errors import InputError

if TYPE_CHECKING:
    from geoexp.power._models import OutcomeMeasure

# Power below which a design is called underpowered.
TARGET_POWER = 0.8  # common practice (Cohen 1988, from memory)


@dataclass(frozen=True, eq=False)
class PowerCurve:
    """Power of the treated-versus-pure-control test over a grid of effects and numbers treated.

    Attributes
    ----------
    design : str
        The design's name.
    table : pandas.DataFrame
        One row per grid point: ``n_treated``, ``rate_ratio`` (the planted
        ratio of treated units' expected counts), ``power`` and ``mc_error``
        (share of simulated trials that reject, and its Monte Carlo error).
    n_treated : int
        The design's own number treated.
    alpha : float
        Significance level of the tests.
    n_sims, n_draws : int
        Simulated trials per point and randomization draws per test.
    """

    design: str
    table: pd.DataFrame
    n_treated: int
    alpha: float
    n_sims: int
    n_draws: int

    def power_at(self, n_treated: int) -> pd.Series:
        """Power by rate ratio at one number treated."""
        rows = self.table[self.table["n_treated"] == n_treated]
        return rows.set_index("rate_ratio")["power"].sort_index()

    def detectable_ratio(self, target: float = TARGET_POWER) -> float | None:
        """The rate ratio closest to 1 whose power reaches ``target`` at the design's number treated.

        Reductions only (ratios below 1); linear interpolation between grid
        points; None when no ratio of the grid reaches the target.
        """
        series = self.power_at(self.n_treated)
        series = series[series.index < 1].sort_index(ascending=False)  # nearest 1 first
        return _crossing(series.index.to_numpy(), series.to_numpy(), target)

    def required_treated(self, rate_ratio: float, target: float = TARGET_POWER) -> float | None:
        """Number treated at which the power for ``rate_ratio`` reaches ``target``.

        Linear interpolation between the numbers treated of the grid; None when
        none of them reaches the target.
        """
        rows = self.table[np.isclose(self.table["rate_ratio"], rate_ratio)]
        if rows.empty:
            raise InputError(f"rate ratio {rate_ratio:g} is not on the curve's grid")
        rows = rows.sort_values("n_treated")
        return _crossing(rows["n_treated"].to_numpy(float), rows["power"].to_numpy(), target)

    def __str__(self) -> str:
        wide = self.table.pivot(index="rate_ratio", columns="n_treated", values="power")
        wide.columns = [f"{int(m)} treated" for m in wide.columns]
        wide.index.name = "rate ratio (treated)"
        return (
            f"Power of the direct-effect test of {self.design} by planted rate ratio and number "
            f"treated ({self.n_sims} simulated trials per point, {self.n_draws} randomization "
            f"draws each, alpha {self.alpha:g}; share of trials that reject):\n"
            + wide.to_string(float_format=lambda v: f"{v:.3f}")
        )


def _crossing(x: np.ndarray, power: np.ndarray, target: float) -> float | None:
    """First x (in the given order) where power reaches target, interpolated linearly."""
    ok = np.flatnonzero(np.isfinite(power) & (power >= target))
    if not ok.size:
        return None
    i = int(ok[0])
    if i == 0:
        return float(x[0])
    x0, x1, p0, p1 = x[i - 1], x[i], power[i - 1], power[i]
    return float(x0 + (target - p0) * (x1 - x0) / (p1 - p0))


def power_curve(
    design,
    model,
    *,
    rate_ratios: Sequence[float] = (0.6, 0.7, 0.8, 0.9),
    n_treated: Sequence[int] | None = None,
    n_sims: int = 200,
    n_draws: int = 500,
    alpha: float = 0.05,
    outcome: OutcomeMeasure = "change",
    seed: int | None = None,
) -> PowerCurve:
    """Simulate the power of the direct-effect test over effect sizes and numbers treated.

    Parameters
    ----------
    design : Design
        A complete-randomization design (``[assignment] method = "complete"``);
        for other methods only the design's own number treated is simulated.
    model : NegativeBinomialOutcome
        The outcome model; its treated rate ratio is replaced at each point,
        its other ratios (spillover) kept.
    rate_ratios : sequence of float
        Planted rate ratios of treated units (0.8 is a 20% reduction).
    n_treated : sequence of int, optional
        Numbers treated to simulate (default: the design's own, half and one
        and a half times it, within the eligible units).
    n_sims, n_draws, alpha, outcome
        As in :func:`simulate_power`.
    seed : int, optional
        Seed of every point (default: the spec's own stream, as
        :func:`simulate_power` uses).

    Returns
    -------
    PowerCurve
    """
    from dataclasses import replace

    from geoexp.design import Design
    from geoexp.power._models import NegativeBinomialOutcome
    from geoexp.power._simulate import simulate_power

    if not isinstance(model, NegativeBinomialOutcome):
        raise InputError("a power curve needs a NegativeBinomialOutcome model (rate ratios)")
    ratios = sorted({float(r) for r in rate_ratios})
    if not ratios or any(not (0 < r < float("inf")) for r in ratios):
        raise InputError(f"rate ratios must be positive numbers, got {list(rate_ratios)}")
    spec = design.spec
    m0 = int(design.draw().n_treated)
    n_eligible = int(design.eligible.sum())
    if spec.assignment.method != "complete":
        counts = [m0]
    elif n_treated is None:
        counts = sorted({max(2, m0 // 2), m0, min(n_eligible - 1, (3 * m0) // 2)})
    else:
        counts = sorted({int(m) for m in n_treated} | {m0})
        bad = [m for m in counts if not 1 <= m < n_eligible]
        if bad:
            raise InputError(
                f"numbers treated must lie between 1 and {n_eligible - 1} (the eligible units "
                f"less one); got {bad}"
            )
    rows = []
    for m in counts:
        if m == m0:
            d = design
        else:
            a = replace(spec.assignment, treated=m, share=None)
            d = Design.from_spec(
                replace(spec, assignment=a), units=design.units, graph=design.graph
            )
        for r in ratios:
            planted = NegativeBinomialOutcome(
                model.baseline, model.dispersion, {**dict(model.rate_ratios), "treated": r}
            )
            result = simulate_power(
                d, planted, n_sims=n_sims, n_draws=n_draws, alpha=alpha, outcome=outcome, rng=seed
            )
            c = result.contrasts[0]
            rows.append({"n_treated": m, "rate_ratio": r, "power": c.power, "mc_error": c.mc_error})
    return PowerCurve(
        design=spec.name,
        table=pd.DataFrame(rows),
        n_treated=m0,
        alpha=float(alpha),
        n_sims=int(n_sims),
        n_draws=int(n_draws),
    )


def underpowered(power: float, target: float = TARGET_POWER) -> bool:
    """True when a simulated power falls below ``target``.

    Parameters
    ----------
    power : float
        Simulated power (share of trials that reject); NaN is not underpowered.
    target : float
        Power wanted (default 0.8).

    Returns
    -------
    bool
        Whether ``power`` is finite and below ``target``.
    """
    return bool(np.isfinite(power) and power < target)
