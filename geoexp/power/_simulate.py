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
matrix product per block of units and contrast, accumulated over the
blocks, never a loop over simulations or draws. The interval the analysis
prints (inverting the test of a constant additive effect) needs two more
columns per simulation in the same products (:func:`inverted_intervals`).
"""

from __future__ import annotations

from collections import deque
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Literal, TypeVar

import numpy as np
import pandas as pd

from geoexp._engine import compute_threads, thread_count
from geoexp._rng import RngLike, Stream, as_seed_sequence, child_sequence
from geoexp.errors import InputError
from geoexp.estimate import contrast_units
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
T = TypeVar("T")
# unpacked bits and their products are float64: significance() counts ties within a
# relative 1e-9, which float32 sums of thousands of weights would not honour
_BLOCK_BYTES = 32 * 2**20
# fewest units in a block of the reference draws' products
_MIN_BLOCK_UNITS = 256


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
    coverage
        Share of simulated trials whose interval by inverting the randomization
        test of a constant additive effect (the interval the analysis prints
        beside the row's verdict, at level 1 - alpha) contains the planted
        effect; NaN when not asked for (``coverage`` of :func:`simulate_power`).
    coverage_mc_error
        Its Monte Carlo error sqrt(c (1 - c) / n_sims).
    n_covered
        Simulated trials whose interval contained the planted effect.
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
    coverage: float = np.nan
    coverage_mc_error: float = np.nan
    n_covered: int = 0


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
    """Condition code of every held unit in draws 0 .. n_sims - 1: (n_held, n_sims), int8."""
    n_words = -(-n_sims // _WORD)
    out = np.zeros((bits.shape[1], n_sims), dtype=np.uint8)
    # the largest code whose bit is set (the conditions of a draw are exclusive), in place
    for c in range(1, bits.shape[0]):
        on = unpack_bits(bits[c][:, :n_words])[:, :n_sims]
        np.multiply(on, np.uint8(c), out=on)
        np.maximum(out, on, out=out)
    return out.view(np.int8)


def _ordered_blocks(work: Callable[[int], T], n_blocks: int) -> Iterator[T]:
    """``work(b)`` for b = 0 .. n_blocks - 1, yielded in that order, on the engine's threads.

    At most one block per thread is in flight, so memory stays within a few
    blocks; the caller adds the results in block order, so its sums do not
    depend on the number of threads.
    """
    n_threads = min(thread_count(), n_blocks)
    if n_threads <= 1:
        for b in range(n_blocks):
            yield work(b)
        return
    with ThreadPoolExecutor(n_threads) as pool:
        pending: deque = deque()
        for b in range(n_blocks):
            pending.append(pool.submit(work, b))
            if len(pending) >= n_threads:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()


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
    plug: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray | None, np.ndarray | None]:
    """The statistic of every reference draw for each simulation (n_sims, n_draws).

    ``rows`` are the contrast's units as rows of ``bits``; ``y`` and ``cond``
    the outcomes and conditions of every held unit in each simulation
    (n_held, n_sims); each simulation's own statistic is :func:`_hajek_each`.

    With ``plug`` (n_conditions, n_sims: each condition's assumed effect in
    each simulation, the trial's own estimates), also the pieces of the test
    of a constant additive effect x on condition k with the other conditions'
    effects at ``plug`` (:func:`geoexp.inference.constant_effect_test`): under
    draw r the imputed outcomes Y_i(l) = y_i - plug_{d_i} - x 1[d_i = k]
    (plug of k and l taken as 0) give the statistic ``u[s, r] - x * v[s, r]``,
    returned as (u, v), each (n_sims, n_draws).

    The sums over the units of each draw's conditions are one matrix product
    per block of units: the draws' indicators of k and of l, each unit's
    scaled by its 1 / pi (units x 2 n_draws), times one matrix of every
    simulation's columns (y_s, 1, and with ``plug`` each unit's plugged
    effect and its indicator of k in trial s). The blocks run on the
    engine's threads, BLAS on one thread each, and are added in block order,
    so the result is the same on any number of threads; memory stays within
    a few blocks of about 32 MB whatever the number of units.
    """
    n_cols = n_sims + 1 + (0 if plug is None else 2 * n_sims)
    a, b = n_sims + 1, 2 * n_sims + 1
    if plug is not None:
        plug = plug.copy()
        plug[[k, l]] = 0.0
        plug = np.nan_to_num(plug, nan=0.0)
        choices = [row[None, :] for row in plug]
    first, end = n_sims, n_sims + n_draws
    w0, w1 = first // _WORD, -(-end // _WORD)
    lo = first - w0 * _WORD
    step = max(_MIN_BLOCK_UNITS, _BLOCK_BYTES // (8 * max(n_cols, (w1 - w0) * _WORD)))
    starts = range(0, rows.size, step)

    def block(i: int) -> np.ndarray:
        start = starts[i]
        rr = rows[start : start + step]
        scaled = np.empty((rr.size, 2 * n_draws))
        for side, (c, p) in enumerate(((k, pk), (l, pl))):
            on = unpack_bits(bits[c][rr, w0:w1])[:, lo : lo + n_draws]
            np.divide(
                on, p[start : start + step, None], out=scaled[:, side * n_draws :][:, :n_draws]
            )
        cols = np.empty((rr.size, n_cols))
        cols[:, :n_sims] = y[rr]
        cols[:, n_sims] = 1.0
        if plug is not None:
            cs = cond[rr]
            np.choose(cs, choices, out=cols[:, a:b])
            np.equal(cs, k, out=cols[:, b:], casting="unsafe")
        return scaled.T @ cols

    sums = np.zeros((2 * n_draws, n_cols))
    with compute_threads():
        for part in _ordered_blocks(block, len(starts)):
            sums += part
    sums_k, sums_l = sums[:n_draws], sums[n_draws:]
    nk, nl = sums_k[:, [n_sims]], sums_l[:, [n_sims]]
    null = np.ascontiguousarray(
        contrast_statistic(sums_k[:, :n_sims], nk, sums_l[:, :n_sims], nl).T
    )
    if plug is None:
        return null, None, None
    u = contrast_statistic(
        sums_k[:, :n_sims] - sums_k[:, a:b], nk, sums_l[:, :n_sims] - sums_l[:, a:b], nl
    ).T
    v = contrast_statistic(sums_k[:, b:], nk, sums_l[:, b:], nl).T
    return null, np.ascontiguousarray(u), np.ascontiguousarray(v)


def _interval_pvalues(
    observed: np.ndarray, u: np.ndarray, v: np.ndarray, x: np.ndarray
) -> np.ndarray:
    """P-values (n, G) of the tests of effects ``x`` (n, G): statistic u - x v against observed - x.

    The equal-tailed two-sided rule of the one significance routine, in
    blocks of simulated trials (about 32 MB of draws at a time).
    """
    n, g = x.shape
    r = u.shape[1]
    out = np.empty((n, g))
    step = max(1, _BLOCK_BYTES // (8 * max(g * r, 1)))
    for a in range(0, n, step):
        b = min(n, a + step)
        xs = x[a:b]
        with np.errstate(invalid="ignore"):
            draws = u[a:b, None, :] - xs[:, :, None] * v[a:b, None, :]
        out[a:b] = significance(observed[a:b, None] - xs, draws, "two-sided")[0]
    return out


def inverted_intervals(
    observed: np.ndarray, u: np.ndarray, v: np.ndarray, level: float
) -> tuple[np.ndarray, np.ndarray]:
    """The interval of every simulated trial by inverting its test of a constant additive effect.

    The test of effect x compares ``observed - x`` with the draws
    ``u - x v`` by the equal-tailed two-sided rule; the interval is the hull
    of the x it does not reject at 1 - ``level`` (Rosenbaum 2002, test
    inversion), found as the analysis finds it
    (:func:`geoexp.inference.constant_effect_test`): a grid of 161 points
    about the estimate with 0 added, widened four-fold (at most five times)
    while an end of the grid is not rejected, then each end refined by 40
    bisections, 0 kept inside when it is not rejected. The grid's first
    half-width is 8 times the spread of the trial's draws (the analysis
    starts from 8 standard errors); both searches find the same ends of an
    interval. Vectorised over the trials.

    Parameters
    ----------
    observed : numpy.ndarray
        The estimate of each trial (n,); NaN when undefined.
    u, v : numpy.ndarray
        (n, R): the statistic of draw r under effect x is ``u - x v``.
    level : float
        Confidence level.

    Returns
    -------
    low, high : numpy.ndarray
        Ends of each trial's interval (n,); an end is infinite when no
        rejection was found on that side, and both are NaN when the estimate
        is undefined.
    """
    alpha = 1 - level
    n = observed.size
    low, high = np.full(n, np.nan), np.full(n, np.nan)
    todo = np.flatnonzero(np.isfinite(observed))
    if todo.size == 0:
        return low, high
    obs, uu, vv = observed[todo], u[todo], v[todo]
    with np.errstate(invalid="ignore"):
        spread = np.nanstd(uu - obs[:, None] * vv, axis=1)
    half = np.where(np.isfinite(spread), np.maximum(8 * spread, 1e-6), 1.0)
    steps = np.linspace(-1.0, 1.0, 161)
    m = todo.size
    grid = np.empty((m, 162))
    inside = np.zeros((m, 162), dtype=bool)
    again = np.arange(m)
    for _ in range(5):
        g = np.sort(
            np.column_stack([obs[again, None] + half[again, None] * steps, np.zeros(again.size)]),
            axis=1,
        )
        grid[again] = g
        inside[again] = _interval_pvalues(obs[again], uu[again], vv[again], g) > alpha
        wide = inside[again, 0] | inside[again, -1]
        if not wide.any():
            break
        half[again[wide]] *= 4
        again = again[wide]
    any_in = inside.any(axis=1)
    first = np.argmax(inside, axis=1)
    last = 161 - np.argmax(inside[:, ::-1], axis=1)

    def refine(a: np.ndarray, b: np.ndarray, which: np.ndarray) -> np.ndarray:
        # bisection between a rejected point a and a non-rejected point b, every trial at once
        a, b = a.copy(), b.copy()
        for _ in range(40):
            mid = (a + b) / 2
            keep = _interval_pvalues(obs[which], uu[which], vv[which], mid[:, None])[:, 0] > alpha
            b = np.where(keep, mid, b)
            a = np.where(keep, a, mid)
        return (a + b) / 2

    lo = np.where(any_in, np.nan, obs)
    hi = lo.copy()
    open_lo = any_in & (first == 0)
    open_hi = any_in & (last == 161)
    lo[open_lo], hi[open_hi] = -np.inf, np.inf
    w = np.flatnonzero(any_in & ~open_lo)
    if w.size:
        lo[w] = refine(grid[w, first[w] - 1], grid[w, first[w]], w)
    w = np.flatnonzero(any_in & ~open_hi)
    if w.size:
        hi[w] = refine(grid[w, last[w] + 1], grid[w, last[w]], w)
    # 0 is on every grid: keep its status exact whatever the bisection did
    zero_in = (inside & (grid == 0.0)).any(axis=1)
    lo = np.where(zero_in, np.minimum(lo, 0.0), lo)
    hi = np.where(zero_in, np.maximum(hi, 0.0), hi)
    low[todo], high[todo] = lo, hi
    return low, high


# units per block of simulated outcomes; each block draws from its own child stream, so the
# outcomes do not depend on how many threads draw them
_OUTCOME_BLOCK = 4096


def _sample_outcomes(
    model: OutcomeModel,
    means: np.ndarray,
    effects: np.ndarray,
    cond: np.ndarray,
    outcome: OutcomeMeasure,
    seed: np.random.SeedSequence,
) -> np.ndarray:
    """Outcomes (n_units, n_sims) of every simulated trial, drawn block by block of units.

    Block b of :data:`_OUTCOME_BLOCK` units draws its post-period (and, for
    ``"change"``, then its pre-period) from the child stream b of ``seed``;
    blocks run on :func:`geoexp._engine.thread_count` threads (numpy's
    generators release the interpreter lock), with the same result on any
    number of threads.
    """
    y = np.empty(cond.shape)

    def block(b: int) -> None:
        rows = slice(b * _OUTCOME_BLOCK, (b + 1) * _OUTCOME_BLOCK)
        gen = np.random.default_rng(child_sequence(seed, b))
        base = means[rows, None]
        c = cond[rows]
        out = model.sample(model.expected(base, effects, c), gen)
        if outcome == "change":
            out -= model.sample(np.broadcast_to(base, c.shape), gen)
        y[rows] = out

    n_blocks = -(-cond.shape[0] // _OUTCOME_BLOCK)
    n_threads = min(thread_count(), n_blocks)
    if n_threads <= 1:
        for b in range(n_blocks):
            block(b)
    else:
        with ThreadPoolExecutor(n_threads) as pool:
            list(pool.map(block, range(n_blocks)))
    return y


def _hajek_each(
    y: np.ndarray, cond: np.ndarray, rows: np.ndarray, k: int, l: int, probs: np.ndarray
) -> np.ndarray:
    """The Hajek contrast of k against l over ``rows`` in every simulated trial (n_sims,).

    Sums over blocks of units, so that memory stays within a few blocks of
    about 32 MB.
    """
    sums = np.zeros((4, y.shape[1]))
    qk, ql = 1 / probs[:, k], 1 / probs[:, l]
    step = max(256, _BLOCK_BYTES // (8 * max(y.shape[1], 1)))
    for start in range(0, rows.size, step):
        rr = slice(start, start + step)
        ys, cs = y[rows[rr]], cond[rows[rr]]
        in_k, in_l = cs == k, cs == l
        sums[0] += np.where(in_k, ys, 0.0).T @ qk[rr]
        sums[1] += in_k.T @ qk[rr]
        sums[2] += np.where(in_l, ys, 0.0).T @ ql[rr]
        sums[3] += in_l.T @ ql[rr]
    return contrast_statistic(sums[0], sums[1], sums[2], sums[3])


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
    probabilities: np.ndarray | None = None,
    coverage: tuple[str, ...] = (),
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
    (n_sims * n_draws * 8 bytes), and one block of about 32 MB (unpacked bits and columns) per
    thread.

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
    probabilities
        The design's exposure probabilities (n_units, n_conditions) when
        already computed from its Monte Carlo stream with
        ``n_draws_probabilities`` draws (e.g.
        ``design.probabilities().probabilities``); computed here otherwise.
    coverage
        Condition codes (e.g. ``("treated", "spillover_1")``) whose rows also
        get the coverage of the interval the analysis prints beside the
        verdict: in each simulated trial, the interval of constant additive
        effects that the randomization test over the row's units does not
        reject at 1 - alpha, the other conditions' effects held at that
        trial's own estimates (:func:`geoexp.inference.constant_effect_test`,
        Rosenbaum 2002), tested on the shared reference draws; coverage is
        the share of trials whose interval contains the planted effect (an
        undefined estimate counts as not covering). It adds two columns per
        trial to the matrix products of those rows (about three times their
        work).

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
        probabilities=probabilities,
        coverage=coverage,
    )[0]


def _floor(design: Design, floor: float | None) -> float:
    """The positivity floor: the argument, else the spec's, else the default (as the analysis)."""
    return design.positivity_floor if floor is None else float(floor)


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
    probabilities: np.ndarray | None = None,
    coverage: tuple[str, ...] = (),
) -> tuple[PowerResult, dict]:
    """:func:`simulate_power`, also returning each contrast's statistics (for tests)."""
    _check_arguments(n_sims, n_draws, alpha, outcome, alternative)
    n_sims, n_draws, alpha = int(n_sims), int(n_draws), float(alpha)
    mapping = design.mapping
    pc = mapping.pure_control
    effects = model.effects(mapping)
    means = model.unit_means(design)
    n_prob = int(n_draws_probabilities or design.spec.draws)
    unknown = [c for c in coverage if c not in mapping.codes[:pc]]
    if unknown:
        raise InputError(
            f"coverage names conditions the design does not have: {unknown}; its contrasts are "
            f"{list(mapping.codes[:pc])}"
        )
    if probabilities is None:
        # the very probabilities the analysis will use: the design's Monte Carlo stream
        probs = condition_bits(
            design.sampler, design.graph, mapping, n_prob, design.stream(Stream.MONTE_CARLO)
        ).probabilities()
    else:
        probs = np.asarray(probabilities, dtype=float)
        if probs.shape != (design.units.n, mapping.n_conditions):
            raise InputError(
                f"probabilities must be (units, conditions) = {(design.units.n, mapping.n_conditions)}, "
                f"got {probs.shape}"
            )

    notes: list[str] = []
    plan: list[tuple[int, np.ndarray, str]] = []
    skipped: dict[int, str] = {}
    populations: dict[int, np.ndarray] = {}
    floor = _floor(design, floor)
    for k in range(pc):
        # the very units of the analysis's row (geoexp.estimate.contrast_units)
        group: Literal["eligible", "never-eligible"] = "eligible" if k == 0 else "never-eligible"
        estimand = contrast_units(
            probs, design.eligible, k, pc, labels=mapping.labels, group=group, floor=floor
        )
        population = np.flatnonzero(estimand.units)
        populations[k] = population
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

    # every row's units, tested or not: the intervals hold each row's effect at its estimate
    used = np.unique(np.concatenate(list(populations.values()))) if plan else np.zeros(0, np.int64)
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
        y = _sample_outcomes(model, means[used], effects, cond, outcome, child_sequence(seed, 1))
        details.update(conditions=cond, outcomes=y)
    # each trial's estimate of every row (the intervals hold the other rows' effects at them)
    plug = np.zeros((pc + 1, n_sims))
    if plan:
        for k, population in populations.items():
            if population.size:
                plug[k] = _hajek_each(
                    y, cond, np.searchsorted(used, population), k, pc, probs[population]
                )
        details["plug"] = plug
    by_code = {}
    for k, population, test in plan:
        rows = np.searchsorted(used, population)
        wanted = mapping.codes[k] in coverage
        observed = plug[k].copy()
        null, u, v = _contrast_draws(
            bits,
            rows,
            k,
            pc,
            probs[population, k],
            probs[population, pc],
            y,
            cond,
            n_sims,
            n_draws,
            plug if wanted else None,
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
        covered = None
        if u is not None and v is not None:
            low, high = inverted_intervals(observed, u, v, 1 - alpha)
            details[mapping.codes[k]].update(u=u, v=v, low=low, high=high)
            with np.errstate(invalid="ignore"):
                covered = int(((low <= planted) & (planted <= high)).sum())
            unbounded = int((np.isinf(low) | np.isinf(high)).sum())
            if unbounded:
                notes.append(
                    f"{mapping.labels[k]} vs {mapping.labels[pc]}: the interval had an "
                    f"unbounded end in {unbounded} of {n_sims} simulated trials (the test "
                    f"rejected no effect on that side with {n_draws} draws), which covers "
                    "trivially"
                )
        by_code[k] = (
            test,
            power,
            int(rejected),
            observed,
            defined,
            planted,
            population.size,
            covered,
        )

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
        test, power, rejected, observed, defined, planted, n_units, covered = by_code[k]
        mc = float(np.sqrt(power * (1 - power) / n_sims))
        cover = np.nan if covered is None else covered / n_sims
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
                coverage=cover,
                coverage_mc_error=float(np.sqrt(cover * (1 - cover) / n_sims)),
                n_covered=0 if covered is None else covered,
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
