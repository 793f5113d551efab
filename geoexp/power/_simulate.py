"""Power by simulation: many simulated trials of a design, each analysed with its own tests.

The engine draws the design once. R = n_sims + n_draws assignments come from
the design's own sampler in one pass of the exposure kernels
(:func:`geoexp.exposure.condition_bits`), held as bit-packed indicators of
every condition for the units that enter some contrast. Draw s < n_sims is
the assignment of simulated trial s; draws n_sims .. R-1 are the
randomization reference shared by every simulated trial. For a contrast of
condition k against pure control l, the Hajek statistic of reference draw r
for outcome vector y_s is

    sum_i b_k[r, i] y_s[i] / pi_k[i] / sum_i b_k[r, i] / pi_k[i]  -  (same for l),

so the numerators and denominators of every (draw, simulation) pair are the
product of an unpacked block of bits (draws x units) with one weight matrix
holding every simulation's column y_s / pi plus the column 1 / pi. That is a
matrix product per block of draws and contrast, never a loop over
simulations or draws.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Literal

import numpy as np
import pandas as pd

from geoexp._rng import RngLike, Stream, as_seed_sequence, child_sequence
from geoexp.errors import InputError
from geoexp.estimate import DEFAULT_FLOOR, contrast_units
from geoexp.exposure import condition_bits, unpack_bits
from geoexp.inference import (
    ALTERNATIVES,
    MIN_FOCAL,
    Alternative,
    contrast_statistic,
    significance,
)
from geoexp.power._models import OutcomeMeasure, OutcomeModel

if TYPE_CHECKING:
    from geoexp.design import Design

_WORD = 64
# unpacked bits and their products are float64: significance() counts ties within a
# relative 1e-9, which float32 sums of thousands of weights would not honour
_BLOCK_BYTES = 32 * 2**20


@dataclass(frozen=True)
class ContrastPower:
    """Power of one contrast's randomization test, with what the simulated trials estimated.

    Attributes
    ----------
    contrast
        Condition code of the exposed side (``"treated"``, ``"spillover_1"``, ...).
    label
        The contrast in words, e.g. ``"treated vs pure control"``.
    test
        The test that was simulated.
    power
        Share of simulated trials whose test rejected at ``alpha`` (NaN: no test).
    mc_error
        Its Monte Carlo error sqrt(p (1 - p) / n_sims).
    n_rejected, n_sims
        Rejections and simulated trials.
    mean_estimate, sd_estimate
        Mean and standard deviation over the simulated trials of the Hajek
        estimate over the test's units.
    planted_effect
        The true effect on the estimand: the mean over the test's units of
        each unit's expected outcome in the exposed condition minus in pure control.
    n_units
        Units in the estimand (the test's population).
    n_undefined
        Simulated trials in which the estimate was undefined (no unit in a
        condition); they count as not rejected.
    effect_words
        The planted effect in words, e.g. ``"a 20% reduction"``.
    sentence
        A plain sentence saying what the power means.
    """

    contrast: str
    label: str
    test: str
    power: float
    mc_error: float
    n_rejected: int
    n_sims: int
    mean_estimate: float
    sd_estimate: float
    planted_effect: float
    n_units: int
    n_undefined: int
    effect_words: str
    sentence: str


@dataclass(frozen=True, eq=False)
class PowerResult:
    """Power of a design's tests for an outcome model, by simulation."""

    design: str
    spec_hash: str
    outcome: str
    alpha: float
    alternative: str
    n_sims: int
    n_draws: int
    n_draws_probabilities: int
    contrasts: tuple[ContrastPower, ...]
    notes: tuple[str, ...] = field(default=())

    def to_frame(self) -> pd.DataFrame:
        """One row per contrast (index: condition code)."""
        rows = [c.__dict__ for c in self.contrasts]
        return pd.DataFrame(rows).set_index("contrast")

    def __str__(self) -> str:
        lines = [
            f"Power of {self.design} (design {self.spec_hash[:12]}): {self.n_sims:,} simulated "
            f"trial{'' if self.n_sims == 1 else 's'}, {self.n_draws:,} randomization "
            f"draw{'' if self.n_draws == 1 else 's'} each, alpha {self.alpha:g} "
            f"({self.alternative}), outcome: {self.outcome}.",
            "",
            f"{'Contrast':<38}{'Power':>7}{'MC error':>10}{'Planted':>10}{'Mean estimate':>15}"
            f"{'SD of estimates':>17}{'Units':>8}",
        ]
        for c in self.contrasts:
            lines.append(
                f"{c.label:<38}{_num(c.power, 3):>7}{_num(c.mc_error, 3):>10}"
                f"{_num(c.planted_effect, 3):>10}{_num(c.mean_estimate, 3):>15}"
                f"{_num(c.sd_estimate, 3):>17}{c.n_units:>8,}"
            )
        lines.append("")
        lines += [f"- {c.sentence}" for c in self.contrasts]
        lines += [f"Note: {n}" for n in self.notes]
        return "\n".join(lines)


def _num(value: float, digits: int) -> str:
    return f"{value:.{digits}f}" if np.isfinite(value) else "-"


def _sim_conditions(bits: np.ndarray, n_sims: int) -> np.ndarray:
    """Condition code of every held unit in draws 0 .. n_sims - 1: (n_held, n_sims)."""
    n_words = -(-n_sims // _WORD)
    out = np.zeros((bits.shape[1], n_sims), dtype=np.intp)
    for c in range(bits.shape[0]):
        out[unpack_bits(bits[c][:, :n_words])[:, :n_sims].astype(bool)] = c
    return out


def _contrast_draws(
    bits: np.ndarray,
    rows: np.ndarray,
    k: int,
    l: int,
    pk: np.ndarray,
    pl: np.ndarray,
    y: np.ndarray,
    cond: np.ndarray,
    n_sims: int,
    n_draws: int,
) -> tuple[np.ndarray, np.ndarray]:
    """Observed statistic of each simulation (n_sims,) and its reference draws (n_sims, n_draws).

    ``rows`` are the contrast's units as rows of ``bits``; ``y`` and ``cond`` their
    outcomes and conditions in each simulation (n_rows, n_sims).
    """
    wk = np.empty((rows.size, n_sims + 1))
    wk[:, :n_sims] = y / pk[:, None]
    wk[:, n_sims] = 1 / pk
    wl = np.empty_like(wk)
    wl[:, :n_sims] = y / pl[:, None]
    wl[:, n_sims] = 1 / pl
    in_k, in_l = cond == k, cond == l
    observed = contrast_statistic(
        (in_k * wk[:, :n_sims]).sum(axis=0),
        in_k.T @ wk[:, n_sims],
        (in_l * wl[:, :n_sims]).sum(axis=0),
        in_l.T @ wl[:, n_sims],
    )
    null = np.empty((n_draws, n_sims))
    first, end = n_sims, n_sims + n_draws
    per_block = max(1, min(16, _BLOCK_BYTES // (8 * _WORD * max(rows.size, 1))))
    w = first // _WORD
    while w * _WORD < end:
        w_end = min(w + per_block, -(-end // _WORD))
        lo = max(first, w * _WORD) - w * _WORD
        hi = min(end, w_end * _WORD) - w * _WORD
        out = slice(w * _WORD + lo - first, w * _WORD + hi - first)
        uk = unpack_bits(bits[k][rows, w:w_end])[:, lo:hi].astype(np.float64)
        ul = unpack_bits(bits[l][rows, w:w_end])[:, lo:hi].astype(np.float64)
        sk = uk.T @ wk
        sl = ul.T @ wl
        null[out] = contrast_statistic(
            sk[:, :n_sims], sk[:, n_sims:], sl[:, :n_sims], sl[:, n_sims:]
        )
        w = w_end
    return observed, np.ascontiguousarray(null.T)


def _band_words(design: Design, k: int) -> str:
    edges = (0.0, *design.mapping.band_edges)
    return f"untreated units {edges[k - 1]:g}-{edges[k]:g} m from a treated unit"


def _sentence(words: str, where: str, power: float, mc: float, alpha: float) -> str:
    if words == "no change":
        return (
            f"With no effect planted on {where}, the test rejects in about {power:.0%} of trials "
            f"(±{mc:.0%}); that is its size, which should be near alpha = {alpha:g}."
        )
    return (
        f"With this design, {words} on {where} would be detected in about {power:.0%} of "
        f"trials (±{mc:.0%})."
    )


def simulate_power(
    design: Design,
    model: OutcomeModel,
    *,
    n_sims: int = 200,
    n_draws: int = 500,
    alpha: float = 0.05,
    outcome: OutcomeMeasure = "change",
    alternative: Alternative = "two-sided",
    n_draws_probabilities: int | None = None,
    rng: RngLike = None,
    floor: float | None = None,
) -> PowerResult:
    """Power of a design's randomization tests, by simulating many trials of it.

    Each simulated trial draws an assignment from the design's own sampler,
    outcomes from ``model`` given each unit's exposure condition, and runs
    the tests of the analysis's rows over the very same units
    (:func:`geoexp.estimate.contrast_units`, with the positivity floor): a
    randomization test of no effect with the Hajek contrast of treated
    against pure control over the treated row's eligible units (Fisher 1935;
    the analysis inverts the same statistic), and, for each spillover band,
    the conditional test of no spillover on the band row's focal units that
    are never treated (Athey, Eckles & Imbens 2018), whose
    null draws are the design's own draws (conditioning is automatic for
    never-treated units). The Hajek contrasts use the exposure probabilities
    of Aronow & Samii (2017) from the design's own Monte Carlo (the spec's
    seed and number of draws, as the analysis computes them).

    R = n_sims + n_draws assignments are drawn once: draw s is simulated trial
    s's assignment and the last n_draws are every trial's randomization
    reference, so each test is a valid Monte Carlo randomization test; the
    trials share that reference, which makes their rejections slightly
    dependent and the reported Monte Carlo error sqrt(p (1 - p) / n_sims)
    a little optimistic.

    Memory: bits of every condition for the units in some contrast over R
    draws (n_conditions * n_units_used * R / 8 bytes), outcomes and weights
    (about 3 * n_units_in_contrast * n_sims * 8 bytes), the reference statistics
    (n_sims * n_draws * 8 bytes), and blocks of unpacked bits of at most 32 MB.

    Parameters
    ----------
    design
        The design, as built by :meth:`geoexp.design.Design.from_spec`.
    model
        Outcome model: :class:`NegativeBinomialOutcome` or :class:`NormalOutcome`.
    n_sims
        Simulated trials.
    n_draws
        Randomization draws of each test.
    alpha
        Significance level of the tests.
    outcome
        ``"change"`` (post minus a pre-period drawn from the baseline without
        effects) or ``"post"``.
    alternative
        ``"two-sided"``, ``"greater"`` or ``"less"``.
    n_draws_probabilities
        Draws for the exposure probabilities (default: the spec's ``draws``).
    rng
        Seed of the simulation (default: the design's power stream).
    floor
        Positivity floor of the rows' units (default: the spec's, else
        :data:`geoexp.estimate.DEFAULT_FLOOR`), as in the analysis: each
        contrast is simulated over the very units the analysis will report
        (:func:`geoexp.estimate.contrast_units`).

    Returns
    -------
    PowerResult
    """
    return _simulate(
        design,
        model,
        n_sims=n_sims,
        n_draws=n_draws,
        alpha=alpha,
        outcome=outcome,
        alternative=alternative,
        n_draws_probabilities=n_draws_probabilities,
        rng=rng,
        floor=floor,
    )[0]


def _floor(design: Design, floor: float | None) -> float:
    """The positivity floor: the argument, else the spec's, else the default (as the analysis)."""
    if floor is None:
        floor = getattr(design.spec, "positivity_floor", None)
    return DEFAULT_FLOOR if floor is None else float(floor)


def _check_arguments(n_sims, n_draws, alpha, outcome, alternative) -> None:
    for name, value in (("n_sims", n_sims), ("n_draws", n_draws)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
            raise InputError(f"{name} must be a positive whole number, got {value!r}")
    if not 0 < float(alpha) < 1:
        raise InputError(f"alpha must lie strictly between 0 and 1, got {alpha!r}")
    if outcome not in ("change", "post"):
        raise InputError(f"outcome must be 'change' or 'post', got {outcome!r}")
    if alternative not in ALTERNATIVES:
        raise InputError(
            f"alternative must be one of {', '.join(ALTERNATIVES)}, got {alternative!r}"
        )


def _simulate(
    design: Design,
    model: OutcomeModel,
    *,
    n_sims: int,
    n_draws: int,
    alpha: float,
    outcome: OutcomeMeasure,
    alternative: Alternative,
    n_draws_probabilities: int | None,
    rng: RngLike,
    floor: float | None = None,
) -> tuple[PowerResult, dict]:
    """:func:`simulate_power`, also returning each contrast's statistics (for tests)."""
    _check_arguments(n_sims, n_draws, alpha, outcome, alternative)
    n_sims, n_draws, alpha = int(n_sims), int(n_draws), float(alpha)
    mapping = design.mapping
    pc = mapping.pure_control
    effects = model.effects(mapping)
    means = model.unit_means(design)
    n_prob = int(n_draws_probabilities or design.spec.draws)
    # the very probabilities the analysis will use: the design's Monte Carlo stream
    probs = condition_bits(
        design.sampler, design.graph, mapping, n_prob, design.stream(Stream.MONTE_CARLO)
    ).probabilities()

    notes: list[str] = []
    plan: list[tuple[int, np.ndarray, str]] = []
    skipped: dict[int, str] = {}
    floor = _floor(design, floor)
    for k in range(pc):
        # the very units of the analysis's row (geoexp.estimate.contrast_units)
        group: Literal["eligible", "never-eligible"] = "eligible" if k == 0 else "never-eligible"
        estimand = contrast_units(
            probs, design.eligible, k, pc, labels=mapping.labels, group=group, floor=floor
        )
        population = np.flatnonzero(estimand.units)
        if k == 0:
            test = "randomization test of no effect on treated units (Hajek contrast)"
            if population.size == 0:
                skipped[k] = "no unit can be both treated and a pure control"
                continue
        else:
            test = "conditional test of no spillover on never-treated focal units"
            if population.size < MIN_FOCAL:
                skipped[k] = (
                    f"only {population.size} never-treated units can be both in this band and "
                    f"pure controls; the spillover test needs at least {MIN_FOCAL}"
                )
                continue
        plan.append((k, population, test))

    used = np.unique(np.concatenate([p for _, p, _ in plan])) if plan else np.zeros(0, np.int64)
    seed = design.stream(Stream.POWER) if rng is None else as_seed_sequence(rng)
    details: dict = {"probabilities": probs, "used": used}
    results: list[ContrastPower] = []
    if used.size:
        bits = condition_bits(
            design.sampler,
            design.graph,
            mapping,
            n_sims + n_draws,
            child_sequence(seed, 0),
            units=used,
        ).bits
        cond = _sim_conditions(bits, n_sims)
        gen = np.random.default_rng(child_sequence(seed, 1))
        base = means[used][:, None]
        y = model.sample(model.expected(base, effects, cond), gen)
        if outcome == "change":
            y = y - model.sample(np.broadcast_to(base, cond.shape), gen)
        details.update(conditions=cond, outcomes=y)
    by_code = {}
    for k, population, test in plan:
        rows = np.searchsorted(used, population)
        observed, null = _contrast_draws(
            bits,
            rows,
            k,
            pc,
            probs[population, k],
            probs[population, pc],
            y[rows],
            cond[rows],
            n_sims,
            n_draws,
        )
        details[mapping.codes[k]] = {"rows": rows, "observed": observed, "null": null}
        defined = np.isfinite(observed)
        # the project's one significance routine, vectorised over the simulated trials
        p_values = significance(observed, null, alternative)[0]
        rejected = int((defined & (p_values <= alpha)).sum())
        power = rejected / n_sims
        planted = float(
            np.mean(
                model.expected(means[population], effects, np.full(population.size, k))
                - model.expected(means[population], effects, np.full(population.size, pc))
            )
        )
        by_code[k] = (test, power, int(rejected), observed, defined, planted, population.size)

    for k in range(pc):
        label = f"{mapping.labels[k]} vs {mapping.labels[pc]}"
        where = "treated units" if k == 0 else _band_words(design, k)
        words = model.describe(effects, k, pc)
        if k in skipped:
            notes.append(f"{label}: no test simulated; {skipped[k]}")
            results.append(
                ContrastPower(
                    contrast=mapping.codes[k],
                    label=label,
                    test="none",
                    power=np.nan,
                    mc_error=np.nan,
                    n_rejected=0,
                    n_sims=n_sims,
                    mean_estimate=np.nan,
                    sd_estimate=np.nan,
                    planted_effect=np.nan,
                    n_units=0,
                    n_undefined=0,
                    effect_words=words,
                    sentence=f"With this design there is no test for {label}: {skipped[k]}.",
                )
            )
            continue
        test, power, rejected, observed, defined, planted, n_units = by_code[k]
        mc = float(np.sqrt(power * (1 - power) / n_sims))
        finite = observed[defined]
        if (~defined).any():
            notes.append(
                f"{label}: the estimate was undefined in {int((~defined).sum())} of {n_sims} "
                "simulated trials (a condition with no unit); they count as not rejected"
            )
        results.append(
            ContrastPower(
                contrast=mapping.codes[k],
                label=label,
                test=test,
                power=float(power),
                mc_error=mc,
                n_rejected=rejected,
                n_sims=n_sims,
                mean_estimate=float(finite.mean()) if finite.size else np.nan,
                sd_estimate=float(finite.std(ddof=1)) if finite.size > 1 else np.nan,
                planted_effect=planted,
                n_units=int(n_units),
                n_undefined=int((~defined).sum()),
                effect_words=words,
                sentence=_sentence(words, where, power, mc, alpha),
            )
        )
    result = PowerResult(
        design=design.spec.name,
        spec_hash=design.spec.hash,
        outcome=outcome,
        alpha=alpha,
        alternative=alternative,
        n_sims=n_sims,
        n_draws=n_draws,
        n_draws_probabilities=n_prob,
        contrasts=tuple(results),
        notes=tuple(notes),
    )
    return result, details


def compare_designs(
    designs: dict[str, Design],
    model: OutcomeModel,
    *,
    n_sims: int = 200,
    n_draws: int = 500,
    alpha: float = 0.05,
    outcome: OutcomeMeasure = "change",
    alternative: Alternative = "two-sided",
    rng: RngLike = None,
) -> pd.DataFrame:
    """Power of several designs for the same outcome model, side by side.

    Each design is simulated with :func:`simulate_power` (its own sampler,
    probabilities and tests). Contrasts are matched by what they compare,
    with the band's distances (``spillover 0-150 m vs pure control``), so the
    first band of a 0-150 m design and that of a 0-100 m design are different
    rows; a design without a row shows missing values there.

    Parameters
    ----------
    designs
        Name -> design.
    model, n_sims, n_draws, alpha, outcome, alternative
        As for :func:`simulate_power`.
    rng
        Seed used for every design (default: each spec's own power stream).

    Returns
    -------
    pandas.DataFrame
        Index: the contrast with its distances; columns: (design name, quantity) with quantities
        ``power``, ``mc_error``, ``planted_effect``, ``mean_estimate``, ``n_units``.
    """
    if not designs:
        raise InputError("compare_designs needs at least one design")
    frames = {}
    # one seed for every design (common random numbers), normalised once
    root = None if rng is None else as_seed_sequence(rng)
    for name, design in designs.items():
        result = simulate_power(
            design,
            model,
            n_sims=n_sims,
            n_draws=n_draws,
            alpha=alpha,
            outcome=outcome,
            alternative=alternative,
            rng=root,
        )
        frame = result.to_frame()[
            ["power", "mc_error", "planted_effect", "mean_estimate", "n_units"]
        ]
        frames[str(name)] = frame.set_axis(
            pd.Index([c.label for c in result.contrasts], name="contrast"), axis=0
        )
    return pd.concat(frames, axis=1, sort=False)
