"""What one candidate design offers: units per condition, positivity, power and detectable effects.

:func:`evaluate_candidate` is a pure function of the candidate's design spec
(which carries its own seed), the shared layer and the simulation settings,
so it gives the same row in any order, in any process and on any machine. It
runs under the engine's thread policy (one BLAS thread, numba on the cores
this process may use).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.stats import norm

from geoexp._engine import compute_threads
from geoexp.design import Design, DesignSpec, eligible_for, units_for
from geoexp.errors import InfeasibleDesignError
from geoexp.graph import ExposureGraph
from geoexp.power import NegativeBinomialOutcome, simulate_power
from geoexp.sweep._spec import Simulation
from geoexp.units import UnitSet


@dataclass(frozen=True, eq=False)
class SweepLayer:
    """What every candidate shares: the units, the eligible mask and one exposure graph.

    The graph reaches as far as the widest band or gap of any candidate; a
    candidate uses only the pairs within its own reach, so its results do not
    depend on the other candidates. On a cluster it is sent to each worker once.
    """

    units: UnitSet
    eligible: np.ndarray
    graph: ExposureGraph

    @classmethod
    def for_specs(cls, base: DesignSpec, specs: list[DesignSpec]) -> SweepLayer:
        """Read the base design's units and eligible units, and build the graph for every spec."""
        units = units_for(base)
        eligible = np.asarray(units.ids.isin(eligible_for(base, units).ids))
        reach = max(max(max(s.exposure.bands_m), s.assignment.gap_m or 0.0) for s in specs)
        graph = ExposureGraph.from_units(
            units,
            reach,
            metric=base.exposure.metric,
            snap_tolerance=base.exposure.snap_tolerance_m,
        )
        return cls(units, eligible, graph)


def minimum_detectable_effect(
    std_error: float, alpha: float, power: float, alternative: str = "two-sided"
) -> float:
    """The smallest true effect a test detects with probability ``power``, given its standard error.

    MDE = (z_{1 - alpha/2} + z_{power}) * SE for a two-sided test at level alpha
    (z_{1 - alpha} one-sided), the normal approximation of Bloom (1995,
    "Minimum detectable effects", Evaluation Review 19(5)).
    """
    tail = alpha / 2 if alternative == "two-sided" else alpha
    return float((norm.ppf(1 - tail) + norm.ppf(power)) * std_error)


def evaluate_candidate(
    spec: DesignSpec,
    layer: SweepLayer,
    simulation: Simulation,
    effects: Mapping[str, float],
    target_power: float = 0.8,
) -> dict[str, Any]:
    """One row of a sweep's table for the candidate design ``spec``.

    Parameters
    ----------
    spec
        The candidate's full design spec, with its own seed
        (:meth:`geoexp.sweep.SweepSpec.design_spec`).
    layer
        The units, eligible units and graph every candidate shares.
    simulation
        Simulated trials, draws, alpha, outcome model settings.
    effects
        Rate ratio per condition code; codes the candidate does not have
        (a second band when it has one) are left out.
    target_power
        The power at which the minimum detectable effect is stated.

    Returns
    -------
    dict
        ``expected_<code>``: expected number of units in each condition (the
        sum of the exposure probabilities, Aronow & Samii 2017);
        ``units_<code>`` and ``lost_<code>``: units in each contrast's estimand
        (both probabilities positive) and units that can be exposed but never
        pure controls; ``power_<code>``, ``mc_error_<code>``,
        ``planted_<code>``, ``bias_<code>`` (mean estimate minus planted
        effect), ``sd_<code>`` (of the estimate over simulated trials) and
        ``mde_<code>`` (:func:`minimum_detectable_effect` with that sd), in
        incidents per unit; ``feasible`` (False, with the reason in ``notes``,
        when no draw of the design can meet its rules); ``seconds``.
    """
    import time

    start = time.perf_counter()
    row: dict[str, Any] = {"spec_hash": spec.short_hash, "seed": spec.seed}
    with compute_threads():
        try:
            design = Design.from_spec(
                spec, units=layer.units, graph=layer.graph, eligible=layer.eligible
            )
        except InfeasibleDesignError as err:
            # one impossible combination of the grid is a finding, not a failure of the sweep
            row.update(feasible=False, notes=f"infeasible: {err}")
            row["seconds"] = time.perf_counter() - start
            return row
        codes = design.mapping.codes
        probabilities = design.probabilities()
        ratios = {k: v for k, v in effects.items() if k in codes}
        model = NegativeBinomialOutcome(simulation.baseline_column, simulation.dispersion, ratios)
        power = simulate_power(
            design,
            model,
            n_sims=simulation.sims,
            n_draws=simulation.draws,
            alpha=simulation.alpha,
            outcome=simulation.outcome,
        )
    row["feasible"] = True
    for code, expected in zip(codes, probabilities.expected_counts().to_numpy(), strict=True):
        row[f"expected_{code}"] = float(expected)
    for code, contrast in zip(codes, probabilities.positivity().contrasts, strict=False):
        row[f"units_{code}"] = contrast.n_units
        row[f"lost_{code}"] = len(contrast.exposure_only)
    for c in power.contrasts:
        row[f"power_{c.contrast}"] = c.power
        row[f"mc_error_{c.contrast}"] = c.mc_error
        row[f"planted_{c.contrast}"] = c.planted_effect
        row[f"bias_{c.contrast}"] = c.mean_estimate - c.planted_effect
        row[f"sd_{c.contrast}"] = c.sd_estimate
        row[f"mde_{c.contrast}"] = minimum_detectable_effect(
            c.sd_estimate, simulation.alpha, target_power
        )
    row["notes"] = "; ".join(power.notes)
    row["seconds"] = time.perf_counter() - start
    return row
