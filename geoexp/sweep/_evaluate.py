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
from geoexp._rng import Stream
from geoexp.design import Design, DesignSpec, eligible_for, units_for
from geoexp.errors import InfeasibleDesignError
from geoexp.exposure import ExposureProbabilities
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

    Parameters
    ----------
    std_error : float
        Standard error of the estimate, in the effect's units.
    alpha : float
        Level of the test.
    power : float
        Probability of detecting the effect wanted.
    alternative : str
        ``"two-sided"``; any other value is one-sided.

    Returns
    -------
    float
        The minimum detectable effect, in the units of ``std_error``.
    """
    tail = alpha / 2 if alternative == "two-sided" else alpha
    return float((norm.ppf(1 - tail) + norm.ppf(power)) * std_error)


def chunk_sizes(simulation: Simulation) -> list[int]:
    """Simulated trials per chunk: all at once, or ``chunk_sims`` at a time (the last smaller).

    Parameters
    ----------
    simulation : Simulation
        The number of simulated trials and the chunk size.

    Returns
    -------
    list of int
        Simulated trials of each chunk, summing to ``simulation.sims``.
    """
    if simulation.chunk_sims is None or simulation.chunk_sims >= simulation.sims:
        return [simulation.sims]
    full, rest = divmod(simulation.sims, simulation.chunk_sims)
    return [simulation.chunk_sims] * full + ([rest] if rest else [])


def _design(spec: DesignSpec, layer: SweepLayer) -> Design:
    return Design.from_spec(spec, units=layer.units, graph=layer.graph, eligible=layer.eligible)


# rows whose interval coverage a candidate's row carries (the rows a sweep ranks by)
COVERAGE_ROWS = ("treated", "spillover_1")


def _probability_part(design: Design, probabilities: ExposureProbabilities) -> dict[str, Any]:
    codes = design.mapping.codes
    row: dict[str, Any] = {}
    for code, expected in zip(codes, probabilities.expected_counts().to_numpy(), strict=True):
        row[f"expected_{code}"] = float(expected)
    for code, contrast in zip(codes, probabilities.positivity().contrasts, strict=False):
        row[f"units_{code}"] = contrast.n_units
        row[f"lost_{code}"] = len(contrast.exposure_only)
    return row


def _power_part(
    design: Design,
    simulation: Simulation,
    effects: Mapping[str, float],
    chunk: int | None,
    probabilities: np.ndarray | None = None,
) -> dict[str, Any]:
    """Power of one chunk of simulated trials (``chunk`` None: all of them, the default stream).

    Chunk ``c`` draws from the design's power stream with index ``c + 1``, so
    every chunk is the same wherever it runs. ``probabilities``: the design's
    own, when the caller has them already (else computed here, once).
    """
    sizes = chunk_sizes(simulation)
    ratios = {k: v for k, v in effects.items() if k in design.mapping.codes}
    model = NegativeBinomialOutcome(simulation.baseline_column, simulation.dispersion, ratios)
    result = simulate_power(
        design,
        model,
        n_sims=simulation.sims if chunk is None else sizes[chunk],
        n_draws=simulation.draws,
        alpha=simulation.alpha,
        outcome=simulation.outcome,
        rng=None if chunk is None else design.stream(Stream.POWER, chunk + 1),
        probabilities=probabilities,
        coverage=tuple(c for c in COVERAGE_ROWS if c in design.mapping.codes),
    )
    return {"contrasts": [c.__dict__ for c in result.contrasts], "notes": list(result.notes)}


def pooled_mean_sd(counts, means, sds) -> tuple[float, float]:
    """Mean and standard deviation (ddof 1) of pooled groups from each group's count, mean and sd.

    The sum of squares about the pooled mean is the within-group sums
    (n_i - 1) s_i^2 plus the between-group sums n_i (m_i - m)^2.

    Parameters
    ----------
    counts : array_like
        Number of values in each group; empty groups are left out.
    means : array_like
        Mean of each group.
    sds : array_like
        Standard deviation (ddof 1) of each group; NaN for a group of one.

    Returns
    -------
    mean : float
        Pooled mean; NaN when every group is empty.
    sd : float
        Pooled standard deviation; NaN for fewer than two values.
    """
    n = np.asarray(counts, dtype=float)
    m = np.asarray(means, dtype=float)
    s = np.asarray(sds, dtype=float)
    keep = n > 0
    n, m, s = n[keep], m[keep], s[keep]
    total = n.sum()
    if total == 0:
        return np.nan, np.nan
    mean = float((n * m).sum() / total)
    if total < 2:
        return mean, np.nan
    within = np.where(n > 1, (n - 1) * np.nan_to_num(s) ** 2, 0.0).sum()
    between = (n * (m - mean) ** 2).sum()
    return mean, float(np.sqrt((within + between) / (total - 1)))


def power_columns(
    parts: list[dict[str, Any]], simulation: Simulation, target_power: float
) -> dict[str, Any]:
    """The power columns of a row from the power of each chunk (in chunk order).

    Parameters
    ----------
    parts : list of dict
        The result of each chunk's task, in chunk order.
    simulation : Simulation
        The simulation settings (its ``alpha`` is the level of the tests).
    target_power : float
        Power used for the minimum detectable effect.

    Returns
    -------
    dict
        Per contrast code: ``power_``, ``mc_error_``, ``planted_``, ``bias_``,
        ``sd_`` and ``mde_`` columns (estimates in the outcome's units); for
        the treated row and the first band, ``coverage_`` and
        ``coverage_mc_error_`` (pooled over chunks: covering trials over all
        trials); and ``notes``.
    """
    row: dict[str, Any] = {}
    for i, first in enumerate(parts[0]["contrasts"]):
        code = first["contrast"]
        same = [p["contrasts"][i] for p in parts]
        n_sims = sum(c["n_sims"] for c in same)
        cover = (
            sum(c["n_covered"] for c in same) / n_sims
            if np.isfinite(first.get("coverage", np.nan))
            else np.nan
        )
        if len(same) == 1:
            power, mean, sd = first["power"], first["mean_estimate"], first["sd_estimate"]
            mc = first["mc_error"]
        else:
            n_sims = sum(c["n_sims"] for c in same)
            power = (
                sum(c["n_rejected"] for c in same) / n_sims if first["test"] != "none" else np.nan
            )
            mc = float(np.sqrt(power * (1 - power) / n_sims))
            mean, sd = pooled_mean_sd(
                [c["n_sims"] - c["n_undefined"] for c in same],
                [c["mean_estimate"] for c in same],
                [c["sd_estimate"] for c in same],
            )
        row[f"power_{code}"] = power
        row[f"mc_error_{code}"] = mc
        row[f"planted_{code}"] = first["planted_effect"]
        row[f"bias_{code}"] = mean - first["planted_effect"]
        row[f"sd_{code}"] = sd
        row[f"mde_{code}"] = minimum_detectable_effect(sd, simulation.alpha, target_power)
        if code in COVERAGE_ROWS:
            row[f"coverage_{code}"] = cover
            row[f"coverage_mc_error_{code}"] = float(np.sqrt(cover * (1 - cover) / n_sims))
    notes = [n for p in parts for n in p["notes"]]
    row["notes"] = "; ".join(dict.fromkeys(notes))
    return row


def evaluate_part(
    spec: DesignSpec,
    layer: SweepLayer,
    simulation: Simulation,
    effects: Mapping[str, float],
    part: int | None,
) -> dict[str, Any]:
    """One task of a chunked candidate: its probabilities (``part`` None) or one chunk's power.

    An infeasible design gives ``{"feasible": False, "notes": ...}``.

    Parameters
    ----------
    spec : DesignSpec
        The candidate's design.
    layer : SweepLayer
        The units, eligible mask and exposure graph every candidate shares.
    simulation : Simulation
        How power is simulated.
    effects : mapping of str to float
        Effect to plant per contrast.
    part : int or None
        Chunk number, or None for the exposure probabilities.

    Returns
    -------
    dict
        The task's columns of the candidate's row.
    """
    with compute_threads():
        try:
            design = _design(spec, layer)
        except InfeasibleDesignError as err:
            return {"feasible": False, "notes": f"infeasible: {err}"}
        if part is None:
            return {"feasible": True, **_probability_part(design, design.probabilities())}
        return _power_part(design, simulation, effects, part)


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
        incidents per unit; for the treated row and the first spillover band,
        ``coverage_<code>`` and ``coverage_mc_error_<code>``: the share of
        simulated trials whose interval printed beside the analysis's verdict
        (inverting the randomization test of a constant additive effect over
        the row's units, the other effects at the trial's estimates, level
        1 - alpha, Rosenbaum 2002) contains the planted effect, tested on the
        simulation's ``draws`` reference draws, with its Monte Carlo standard
        error sqrt(c (1 - c) / sims) (:func:`geoexp.power.simulate_power`,
        ``coverage``); ``feasible`` (False, with the reason in ``notes``,
        when no draw of the design can meet its rules); ``seconds``. With
        ``simulation.chunk_sims``, the simulated trials run in chunks
        (:func:`chunk_sizes`), each from its own stream, and are pooled.
    """
    import time

    start = time.perf_counter()
    row: dict[str, Any] = {"spec_hash": spec.short_hash, "seed": spec.seed}
    with compute_threads():
        try:
            design = _design(spec, layer)
        except InfeasibleDesignError as err:
            # one impossible combination of the grid is a finding, not a failure of the sweep
            row.update(feasible=False, notes=f"infeasible: {err}")
            row["seconds"] = time.perf_counter() - start
            return row
        row["feasible"] = True
        # one Monte Carlo of the exposure probabilities, for positivity and every chunk's tests
        probabilities = design.probabilities()
        row.update(_probability_part(design, probabilities))
        sizes = chunk_sizes(simulation)
        chunks = [None] if len(sizes) == 1 else list(range(len(sizes)))
        parts = [
            _power_part(design, simulation, effects, c, probabilities.probabilities) for c in chunks
        ]
    row.update(power_columns(parts, simulation, target_power))
    row["seconds"] = time.perf_counter() - start
    return row
