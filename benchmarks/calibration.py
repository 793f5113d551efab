"""Calibration of the analysis: size, bias, coverage and power on the sample city.

Run: PYTHONPATH=. python benchmarks/calibration.py [--trials 200] [--full-trials N]
     [--draws 500] [--quick] [--outcome change|post] [--out benchmarks/results]
     [--designs complete,apart,blocked,saturation,rerandomized]

Five design kinds over the invented city's 150 hot-spot segments (the
eligible units of :func:`geoexp.quickstart.demo_spec`, bands 150/300 m):

``complete``      40 treated at random;
``apart``         40 treated, no two within 150 m, at least 20 pure controls (the demo);
``blocked``       a share 40/150 treated within each district;
``saturation``    districts drawn to saturations 0, 30% and 60% (Baird et al. 2018);
``rerandomized``  complete, kept only when balanced on the pre-period count
                  (Morgan & Rubin 2012, acceptance 10%).

Outcomes are fixed potential outcomes (Neyman-Rubin): every segment's
post-period count without treatment is drawn once from a negative binomial
with the segment's mean over the city's two years of counts (dispersion
``--dispersion``); the pre-period is the city's second year. The analysed
outcome is the change, post minus pre (the analysis's default), or with
``--outcome post`` the post-period count. Scenarios:

``null``        no effect at all (sharp null);
``additive``    -5 incidents per treated segment, -0.5 in band 1, 0 in band 2;
``rate ratio``  treated x0.7, band 1 x0.9, band 2 x1;
``shift``       a grid of additive effects on treated segments only (power curve).

Each simulated trial draws its assignment from the design's own sampler and
its randomization reference (``--draws`` draws) from the same sampler, each
trial with its own child stream of one root seed: trial ``t`` of design
number ``d`` uses ``SeedSequence(seed, spawn_key=(d, t))``, child 0 for the
assignment and child 1 for the reference, so any trial can be rerun alone.
The exposure probabilities and their joint probabilities come once per
design from the design's draws and seed (as the analysis does). For every
row (treated, band 1, band 2; each against pure controls) a trial records
what the analysis prints: the Hajek and Horvitz-Thompson estimates with the
Aronow & Samii (2017) standard errors and normal intervals, the interval by
test inversion (Rosenbaum 2002), the p-value of Fisher's test of no effect
at all and, for the bands, of the conditional test of no spillover on focal
units (Athey, Eckles & Imbens 2018). The p-values use the library's
significance routine on statistics computed for all scenarios at once from
one pass over the reference draws; the first trial of every design checks
them against :func:`geoexp.inference.fisher_test` and
:func:`geoexp.inference.spillover_test` run on the same draws. An
equal-tailed two-sided p-value, min(1, 2 min(P(T >= t), P(T <= t))), is
computed beside the library's rule from the same draws, for comparison.

Every call into geoexp goes through :func:`build_design` and
:func:`analyse_trial`, so the harness follows the API when it changes.

Writes ``calibration_<date>_<commit>.csv`` (every figure, one row per design x
scenario x row) and ``.md`` (the tables and the comparison with the
baseline figures below) into ``--out``. See benchmarks/results/README.md.
"""

from __future__ import annotations

import os

# two shared cores: one thread each for numba and BLAS
for _var in ("NUMBA_NUM_THREADS", "OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import copy  # noqa: E402
import datetime as dt  # noqa: E402
import json  # noqa: E402
import subprocess  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from dataclasses import dataclass  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

import geoexp  # noqa: E402
from geoexp.design import Design, DesignSpec  # noqa: E402
from geoexp.estimate import estimate_contrast  # noqa: E402
from geoexp.exposure import (  # noqa: E402
    DEFAULT_FLOOR,
    assign_conditions,
    condition_bits,
    contrast_units,
    dependence_pairs,
)
from geoexp.inference import (  # noqa: E402
    ContrastSpec,
    constant_effect_test,
    fisher_test,
    rate_ratio_test,
    significance,
    spillover_test,
)
from geoexp.quickstart import demo_spec  # noqa: E402
from geoexp.sampleregion import load_sample_region  # noqa: E402

ALPHA = 0.05
LEVEL = 0.95
SEED = 20261202
# Scenario effects per exposure row (treated, band 1, band 2); pure control is the reference.
ADDITIVE = (-5.0, -0.5, 0.0)
RATE_RATIO = (0.7, 0.9, 1.0)
SHIFTS = (-10.0, -5.0, -2.0, -1.0, 1.0, 2.0, 5.0, 10.0)

DESIGNS = {
    "complete": ({"method": "complete", "treated": 40}, None),
    "apart": (
        {"method": "complete", "treated": 40, "gap_m": 150.0, "min_pure_controls": 20},
        None,
    ),
    "blocked": ({"method": "blocked", "block_column": "district", "block_share": 40 / 150}, None),
    "saturation": (
        {
            "method": "saturation",
            "cluster_column": "district",
            "saturations": [0.0, 0.3, 0.6],
            "cluster_counts": [0.25, 0.375, 0.375],
        },
        None,
    ),
    "rerandomized": (
        {"method": "complete", "treated": 40},
        {"covariates": ["incidents_y2"], "acceptance": 0.1},
    ),
}

# The figures measured before (issue text), printed beside this run's.
BASELINE = {
    "hajek_bias": "Hajek bias 17-56% of the planted effect on every design except saturation",
    "complete_minus5": "complete design, planted -5 on treated: Hajek mean -2.54 (+/- 0.05)",
    "complete_band1": "complete design, planted -0.5 in band 1: Hajek mean -0.347 (+/- 0.007)",
    "demo_minus10": "demo design (apart), real reduction of 10: two-sided rule rejects in 3.9% "
    "(equal-tailed 19.9%)",
    "se_ratio": "spillover rows: A&S SE 1.8-3.3x the estimate's actual spread",
    "size": "size of the Fisher and spillover tests under the sharp null: 3.6-6.2%",
}


# ---------------------------------------------------------------- the adapter to geoexp


@dataclass(frozen=True, eq=False)
class Context:
    """One design with everything that does not depend on outcomes, computed once."""

    name: str
    design: Design
    probs: np.ndarray
    bits: object
    near: tuple[np.ndarray, np.ndarray]
    rows: tuple[int, ...]
    pure: int
    labels: tuple[str, ...]
    held: np.ndarray  # positions of the units in some row's estimand
    focal: tuple[np.ndarray | None, ...]  # per row: focal positions of the spillover test
    units: tuple[np.ndarray, ...]  # per row: the row's units (boolean), as the analysis's rows
    pre: np.ndarray  # each unit's pre-period count (the rate ratio's baseline)


def build_design(name: str, spec: DesignSpec, units=None, graph=None) -> Context:
    """Resolve the spec and compute the exposure probabilities once, as the analysis does."""
    design = Design.from_spec(spec, units=units, graph=graph)
    mapping = design.mapping
    pc = mapping.pure_control
    bits = condition_bits(design.sampler, design.graph, mapping, spec.draws, design.stream(1))
    probs = bits.probabilities()
    clusters = None
    sampler = design.sampler
    while not hasattr(sampler, "cluster_codes") and hasattr(sampler, "base"):
        sampler = sampler.base
    if hasattr(sampler, "cluster_codes"):
        clusters = np.empty(design.units.n, dtype=object)
        clusters[np.asarray(sampler.eligible)] = np.asarray(sampler.clusters)
    near = dependence_pairs(
        design.graph, mapping, design.eligible, gap=spec.assignment.gap_m, clusters=clusters
    )
    rows = tuple(range(pc))
    # the analysis's rows: treated on the eligible units, each band on the units that can
    # never be treated (the focal units of its exact test), both probabilities at the floor
    floor = getattr(spec, "positivity_floor", None) or DEFAULT_FLOOR
    units_of = tuple(
        contrast_units(
            probs,
            design.eligible,
            k,
            pc,
            labels=mapping.labels,
            group="eligible" if k == 0 else "never-eligible",
            floor=floor,
        ).units
        for k in rows
    )
    some = np.logical_or.reduce(units_of)
    focal = tuple(None if k == 0 else np.flatnonzero(units_of[k]) for k in rows)
    pre = design.units.frame["incidents_y2"].to_numpy(dtype=float)
    return Context(
        name,
        design,
        probs,
        bits,
        near,
        rows,
        pc,
        mapping.labels,
        np.flatnonzero(some),
        focal,
        units_of,
        pre,
    )


def analyse_trial(
    ctx: Context,
    seq: np.random.SeedSequence,
    outcomes: np.ndarray,
    n_draws: int,
    n_main: int,
    *,
    post_offset: np.ndarray | None = None,
    full: bool = True,
    intervals: bool = True,
    check: bool = False,
) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Draw one trial and compute the analysis's printed numbers for every scenario and row.

    ``outcomes`` holds the potential outcomes (n_units, n_conditions, Q) of Q
    scenarios, the analysed outcome (change). Every trial gets the Hajek and
    Horvitz-Thompson estimates and the tests; a ``full`` trial also the
    standard errors, normal intervals and inverted-test intervals of the first
    ``n_main`` scenarios (the shift grid gets none). ``check`` (needs ``full``)
    compares the harness's own sums with the library's functions on the same
    draws. ``post_offset`` turns the analysed outcome into the post-period count
    (the pre-period for the change, zero for the post-period outcome) for the
    rate ratio. Returns the observed conditions and a dict of arrays (Q, n_rows).
    """
    design, probs, pc = ctx.design, ctx.probs, ctx.pure
    n = design.units.n
    assign_seq, ref_seq = (
        np.random.SeedSequence(seq.entropy, spawn_key=(*seq.spawn_key, i)) for i in (0, 1)
    )
    treated_pos = np.asarray(design.sampler.draw_many(1, assign_seq).treated(0))
    treated = np.zeros(n, dtype=bool)
    treated[treated_pos] = True
    observed = assign_conditions(design.graph, design.mapping, treated_pos).astype(np.int64)
    q = outcomes.shape[2]
    y = outcomes[np.arange(n), observed, :]  # (n, Q) observed outcomes
    nr = len(ctx.rows)
    out = {
        key: np.full((q, nr), np.nan)
        for key in (
            "est_hajek se_hajek lo_hajek hi_hajek est_ht se_ht lo_ht hi_ht ri_lo ri_hi "
            "p_fisher p_fisher_eq p_spill p_spill_eq p_row rr_est rr_lo rr_hi p_rr"
        ).split()
    }
    # Aronow-Samii standard errors, normal intervals (library): full trials only. Scenarios
    # inside the row loop, so the joint-probability blocks of one assignment are reused.
    for k in ctx.rows if full else ():
        for s in range(n_main):
            for est, tag in (("hajek", "hajek"), ("horvitz-thompson", "ht")):
                e = estimate_contrast(
                    y[:, s],
                    observed,
                    probs,
                    k,
                    pc,
                    ctx.bits,
                    labels=ctx.labels,
                    estimator=est,
                    level=LEVEL,
                    near=ctx.near,
                    units=ctx.units[k],
                )
                out[f"est_{tag}"][s, k] = e.estimate
                out[f"se_{tag}"][s, k] = e.std_error
                out[f"lo_{tag}"][s, k] = e.ci_low
                out[f"hi_{tag}"][s, k] = e.ci_high
    # Randomization tests: one pass of the design's sampler (the trial's own reference draws)
    # serves every scenario; the statistic is the Hajek contrast, as in the analysis.
    ref = condition_bits(
        design.sampler, design.graph, design.mapping, n_draws, ref_seq, units=ctx.held
    )
    held = ctx.held
    ind = [_unpack_rows(ref.bits[c], n_draws) for c in range(pc + 1)]  # (R, held) each
    y_h, obs_h, p_h = y[held], observed[held], probs[held]
    for k in ctx.rows:
        masks = [("fisher", ctx.units[k][held])]
        if ctx.focal[k] is not None and ctx.focal[k].size >= 10:
            focal_mask = np.zeros(n, dtype=bool)
            focal_mask[ctx.focal[k]] = True
            masks.append(("spill", focal_mask[held]))
        for test, mask in masks:
            t_obs, t_ref, ht_obs = _hajek_statistics(ind, y_h, obs_h, p_h, k, pc, mask)
            if test == "fisher":
                # the estimates of every trial; equal to the library's (checked in trial 0)
                if check:
                    for s in range(n_main):
                        _same(t_obs[s], out["est_hajek"][s, k], f"{ctx.name} Hajek, row {k}")
                        _same(ht_obs[s], out["est_ht"][s, k], f"{ctx.name} HT, row {k}")
                out["est_hajek"][:, k] = t_obs
                out["est_ht"][:, k] = ht_obs
            for s in range(q):
                if not np.isfinite(t_obs[s]):
                    continue
                p, _, _ = significance(t_obs[s], t_ref[:, s], "absolute")
                hi, _, _ = significance(t_obs[s], t_ref[:, s], "greater")
                lo, _, _ = significance(t_obs[s], t_ref[:, s], "less")
                out[f"p_{test}"][s, k] = p
                out[f"p_{test}_eq"][s, k] = min(1.0, 2 * min(hi, lo))
            if check and test == "fisher":
                lib = fisher_test(
                    design,
                    observed,
                    y[:, 0],
                    probs,
                    ContrastSpec(k, pc, ctx.units[k]),
                    n_draws=n_draws,
                    rng=ref_seq,
                )
                _same(lib.p_value, out["p_fisher_eq"][0, k], f"{ctx.name} Fisher p, row {k}")
            if check and test == "spill":
                lib = spillover_test(
                    design,
                    observed,
                    treated,
                    y[:, 0],
                    probs,
                    k,
                    focal=ctx.focal[k],
                    n_draws=n_draws,
                    rng=ref_seq,
                )
                _same(lib.p_value, out["p_spill_eq"][0, k], f"{ctx.name} spillover p, row {k}")
    if full:
        # what the analysis prints beside each verdict: the inverted test of no additive effect
        # on the row's units (other effects at their estimates) and the rate ratio on
        # post-period counts, each side against its own pre-period, with its inverted interval
        post = y + (0.0 if post_offset is None else post_offset[:, None])
        for s in range(n_main):
            plug = np.zeros(pc + 1)
            ratios = np.ones(pc + 1)
            for k in ctx.rows:
                if np.isfinite(out["est_hajek"][s, k]):
                    plug[k] = out["est_hajek"][s, k]
                r = _rate_ratio(post[:, s], observed, probs, k, pc, ctx.units[k], ctx.pre)
                ratios[k] = r if np.isfinite(r) and r > 0 else 1.0
            for k in ctx.rows:
                if not np.isfinite(out["est_hajek"][s, k]):
                    continue
                spec_k = ContrastSpec(k, pc, ctx.units[k])
                add = constant_effect_test(
                    design,
                    observed,
                    y[:, s],
                    probs,
                    spec_k,
                    plug,
                    n_draws=n_draws,
                    rng=ref_seq,
                    level=LEVEL,
                    center=out["est_hajek"][s, k],
                    scale=max(out["se_hajek"][s, k], 1e-6),
                    interval=intervals,
                )
                out["ri_lo"][s, k], out["ri_hi"][s, k] = add.ci_low, add.ci_high
                out["p_row"][s, k] = add.test.p_value
                if (post[:, s] < 0).any():  # an additive effect below zero: not counts
                    continue
                rate = rate_ratio_test(
                    design,
                    observed,
                    post[:, s],
                    probs,
                    spec_k,
                    ratios,
                    n_draws=n_draws,
                    rng=ref_seq,
                    level=LEVEL,
                    interval=intervals,
                    baseline=ctx.pre if (ctx.pre[ctx.units[k]] > 0).any() else None,
                )
                out["rr_est"][s, k] = rate.estimate
                out["rr_lo"][s, k], out["rr_hi"][s, k] = rate.ci_low, rate.ci_high
                out["p_rr"][s, k] = rate.test.p_value
    return observed, out


def _rate_ratio(post, observed, probs, k, pc, units, baseline) -> float:
    """The analysis's rate ratio: each side's Hajek mean of post over its Hajek mean of pre."""
    hk, hl = units & (observed == k), units & (observed == pc)
    if not hk.any() or not hl.any():
        return float("nan")
    wk, wl = 1 / probs[hk, k], 1 / probs[hl, pc]
    with np.errstate(invalid="ignore", divide="ignore"):
        rk = np.average(post[hk], weights=wk) / np.average(baseline[hk], weights=wk)
        rl = np.average(post[hl], weights=wl) / np.average(baseline[hl], weights=wl)
        return float(rk / rl) if rl > 0 else float("nan")


def _same(a: float, b: float, what: str) -> None:
    if not np.isclose(a, b, rtol=1e-9, atol=1e-12):
        raise SystemExit(f"the harness disagrees with the library: {what}: {a!r} vs {b!r}")


def _unpack_rows(words: np.ndarray, n_draws: int) -> np.ndarray:
    """(R, n_held) float64 indicators from one condition's packed bits (n_held, words)."""
    words = np.ascontiguousarray(words, dtype="<u8")
    dense = np.unpackbits(
        words.view(np.uint8).reshape(words.shape[0], -1), axis=1, bitorder="little"
    )[:, :n_draws]
    return np.ascontiguousarray(dense.T, dtype=np.float64)


def _hajek_statistics(ind, y, observed, probs, k, pc, mask):
    """Observed Hajek contrast (Q,), its value in every reference draw (R, Q), observed HT (Q,).

    Over the units in ``mask`` with both probabilities positive:
    sum_{D=k} y/pi_k / sum_{D=k} 1/pi_k - (the same for pure control), as a
    matrix product of the draws' indicators with the weight columns of every
    scenario (Aronow & Samii 2017; the statistic of the library's tests).
    """
    pop = mask & (probs[:, k] > 0) & (probs[:, pc] > 0)
    stats = []
    for c in (k, pc):
        w = np.zeros((y.shape[0], y.shape[1] + 1))
        w[pop, :-1] = y[pop] / probs[pop, c, None]
        w[pop, -1] = 1 / probs[pop, c]
        ref = ind[c] @ w
        obs = w[observed == c].sum(axis=0)
        stats.append((obs, ref))
    (ok, rk), (ol, rl) = stats
    with np.errstate(invalid="ignore", divide="ignore"):
        t_obs = ok[:-1] / ok[-1] - ol[:-1] / ol[-1]
        t_ref = rk[:, :-1] / rk[:, -1:] - rl[:, :-1] / rl[:, -1:]
    ht_obs = (ok[:-1] - ol[:-1]) / max(int(pop.sum()), 1)
    return t_obs, t_ref, ht_obs


# ---------------------------------------------------------------- outcomes and scenarios


def potential_outcomes(ctx: Context, dispersion: float, seed: int, outcome: str = "change"):
    """Potential outcomes (n, C, Q), scenario names, planted effect and rate ratio per
    scenario and row, and the offset from the analysed outcome to the post-period count.

    ``outcome`` is ``"change"`` (post minus pre, the analysis's default) or ``"post"``.
    """
    frame = ctx.design.units.frame
    pre = frame["incidents_y2"].to_numpy(dtype=float)
    if outcome == "post":
        pre = np.zeros_like(pre)
    level = (frame["incidents_y1"] + frame["incidents_y2"]).to_numpy(dtype=float) / 2 + 0.05
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(99,)))
    if dispersion > 0:
        size = 1 / dispersion
        y0 = rng.negative_binomial(size, size / (size + level)).astype(float)
    else:
        y0 = rng.poisson(level).astype(float)
    n_cond = ctx.pure + 1
    names, columns = [], []

    def add(name: str, add_by_row, mult_by_row):
        po = np.repeat(y0[:, None], n_cond, axis=1)
        for k in ctx.rows:
            po[:, k] = y0 * mult_by_row[k] + add_by_row[k]
        names.append(name)
        columns.append(po - pre[:, None])

    zero, one = (0.0,) * len(ctx.rows), (1.0,) * len(ctx.rows)
    add("null", zero, one)
    add("additive", ADDITIVE, one)
    add("rate ratio", zero, RATE_RATIO)
    for shift in SHIFTS:
        add(f"shift {shift:+g}", (shift,) + zero[1:], one)
    outcomes = np.stack(columns, axis=2)
    planted = np.zeros((len(names), len(ctx.rows)))
    ratios = np.full((len(names), len(ctx.rows)), np.nan)
    for k in ctx.rows:
        pop = ctx.units[k]
        planted[:, k] = (outcomes[pop, k, :] - outcomes[pop, ctx.pure, :]).mean(axis=0)
        ratios[0, k] = 1.0  # no effect at all: every ratio is 1
        ratios[2, k] = RATE_RATIO[k]  # each unit's post-period count times the ratio
    return outcomes, names, planted, ratios, pre


# ---------------------------------------------------------------- summary


def summarise(
    records: dict[str, np.ndarray], names, planted, ctx, n_main, ratios=None
) -> pd.DataFrame:
    """One row per scenario x contrast row: bias, spread, coverage and rejection, with MC SEs."""
    rows = []
    for s, scen in enumerate(names):
        for k in ctx.rows:
            get = {key: v[:, s, k] for key, v in records.items()}
            tau = planted[s, k]
            r = {"scenario": scen, "row": ctx.labels[k], "planted": tau}
            r["n_units"] = int(ctx.units[k].sum())
            rho = np.nan if ratios is None else ratios[s, k]
            r["planted_ratio"] = rho
            a, b = get["rr_lo"], get["rr_hi"]
            ok = (np.isfinite(a) | np.isfinite(b)) & np.isfinite(rho)
            cov = (np.nan_to_num(a, nan=-np.inf) <= rho) & (rho <= np.nan_to_num(b, nan=np.inf))
            r["cover_rr"], r["mcse_cover_rr"] = _rate(cov[ok])
            rr = get["rr_est"]
            ok = np.isfinite(rr)
            r["mean_rr"] = rr[ok].mean() if ok.any() else np.nan
            for tag in ("hajek", "ht"):
                est = get[f"est_{tag}"]
                ok = np.isfinite(est)
                m = ok.sum()
                r[f"n_{tag}"] = int(m)
                r[f"mean_{tag}"] = est[ok].mean() if m else np.nan
                sd = est[ok].std(ddof=1) if m > 1 else np.nan
                r[f"mcse_mean_{tag}"] = sd / np.sqrt(m) if m > 1 else np.nan
                r[f"bias_{tag}"] = r[f"mean_{tag}"] - tau
                scale = abs(tau) if abs(tau) > 1e-12 else np.nan
                r[f"bias_pct_{tag}"] = 100 * r[f"bias_{tag}"] / scale
                r[f"mcse_bias_pct_{tag}"] = 100 * r[f"mcse_mean_{tag}"] / scale
                r[f"sd_{tag}"] = sd
                se = get[f"se_{tag}"]
                r[f"mean_se_{tag}"] = np.nanmean(se) if np.isfinite(se).any() else np.nan
                r[f"se_over_sd_{tag}"] = r[f"mean_se_{tag}"] / sd if sd else np.nan
            for name, lo, hi in (
                ("hajek", "lo_hajek", "hi_hajek"),
                ("ht", "lo_ht", "hi_ht"),
                ("ri", "ri_lo", "ri_hi"),
            ):
                a, b = get[lo], get[hi]
                ok = np.isfinite(a) | np.isfinite(b)
                cov = (
                    (np.nan_to_num(a, nan=-np.inf) <= tau) & (tau <= np.nan_to_num(b, nan=np.inf))
                )[ok]
                r[f"cover_{name}"], r[f"mcse_cover_{name}"] = _rate(cov)
            for test in ("fisher", "fisher_eq", "spill", "spill_eq", "row", "rr"):
                p = get[f"p_{test}"]
                r[f"reject_{test}"], r[f"mcse_reject_{test}"] = _rate(p[np.isfinite(p)] <= ALPHA)
            rows.append(r)
    return pd.DataFrame(rows)


def _rate(hits: np.ndarray) -> tuple[float, float]:
    if hits.size == 0:
        return np.nan, np.nan
    p = hits.mean()
    return float(p), float(np.sqrt(p * (1 - p) / hits.size))


# ---------------------------------------------------------------- the run


def run_design(
    name, ctx, n_trials, n_full, n_draws, intervals, dispersion, seed, index, echo, outcome
):
    outcomes, names, planted, ratios, offset = potential_outcomes(ctx, dispersion, seed, outcome)
    n_main = 3
    records: dict[str, list] = {}
    start = time.perf_counter()
    root = np.random.SeedSequence(seed)
    for t in range(n_trials):
        seq = np.random.SeedSequence(root.entropy, spawn_key=(index, t))
        _, out = analyse_trial(
            ctx,
            seq,
            outcomes,
            n_draws,
            n_main,
            post_offset=offset,
            full=t < n_full,
            intervals=intervals,
            check=(t == 0 < n_full),
        )
        for key, v in out.items():
            records.setdefault(key, []).append(v)
        if t == 0 or (t + 1) % max(1, n_trials // 5) == 0:
            took = time.perf_counter() - start
            echo(
                f"  {name}: {t + 1}/{n_trials} trials, {took:.0f} s ({took / (t + 1):.2f} s/trial)"
            )
    arrays = {key: np.stack(v) for key, v in records.items()}
    table = summarise(arrays, names, planted, ctx, n_main, ratios)
    table.insert(0, "design", name)
    table["n_trials"] = n_trials
    table["n_full_trials"] = min(n_full, n_trials)
    table["n_draws"] = n_draws
    table["seconds"] = time.perf_counter() - start
    return table


def geoexp_commit() -> str:
    """Short commit of the checkout geoexp was imported from ("-dirty" if geoexp/ has changes)."""
    root = Path(geoexp.__file__).resolve().parents[1]
    try:
        head = subprocess.run(
            ["git", "-C", str(root), "rev-parse", "--short", "HEAD"],
            capture_output=True,
            text=True,
            check=True,
        ).stdout.strip()
        dirty = subprocess.run(
            ["git", "-C", str(root), "status", "--porcelain", "--", "geoexp"],
            capture_output=True,
            text=True,
            check=True,
        ).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        return "unknown"
    return head + ("-dirty" if dirty else "")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trials", type=int, default=200, help="simulated trials per design")
    parser.add_argument(
        "--full-trials",
        type=int,
        default=None,
        help="trials (the first ones) that also get standard errors and intervals (default: all)",
    )
    parser.add_argument("--draws", type=int, default=500, help="draws per randomization test")
    parser.add_argument(
        "--prob-draws", type=int, default=2000, help="draws for the exposure probabilities"
    )
    parser.add_argument("--quick", action="store_true", help="a smoke run: 8 trials, 100 draws")
    parser.add_argument("--designs", default=",".join(DESIGNS), help="comma-separated kinds")
    parser.add_argument("--dispersion", type=float, default=0.5, help="NB2 dispersion (0: Poisson)")
    parser.add_argument(
        "--outcome", choices=["change", "post"], default="change", help="the analysed outcome"
    )
    parser.add_argument("--seed", type=int, default=SEED, help="root seed")
    parser.add_argument("--no-intervals", action="store_true", help="skip test inversion")
    parser.add_argument("--out", default=str(Path(__file__).parent / "results"))
    parser.add_argument(
        "--coverage-file",
        default=None,
        help="also write the printed intervals' coverage here (the report reads "
        "geoexp/report/calibration.json)",
    )
    parser.add_argument(
        "--summarise",
        nargs="+",
        metavar="CSV",
        help="write --coverage-file from these tables (runs with different seeds pool) and stop",
    )
    args = parser.parse_args()
    if args.summarise:
        # the scenario "null" is a name here, not a missing value
        tables = [read_table(path) for path in args.summarise]
        stems = [Path(path).stem.split("_") for path in args.summarise]
        summary = coverage_summary(
            pd.concat(tables, ignore_index=True),
            ", ".join(sorted({s[2] for s in stems})),
            [Path(path).name for path in args.summarise],
            measured=max(s[1] for s in stems),
        )
        target = args.coverage_file or "coverage.json"
        Path(target).write_text(json.dumps(summary, indent=2) + "\n", encoding="utf-8")
        print(json.dumps(summary, indent=2))
        return
    if args.quick:
        args.trials, args.draws = min(args.trials, 8), min(args.draws, 100)
    full = args.trials if args.full_trials is None else max(0, min(args.full_trials, args.trials))
    args.full_trials = full
    kinds = [k.strip() for k in args.designs.split(",") if k.strip()]
    unknown = sorted(set(kinds) - set(DESIGNS))
    if unknown:
        raise SystemExit(f"unknown design kinds {unknown}; choose from {list(DESIGNS)}")
    commit = geoexp_commit()
    print(
        f"geoexp {commit} from {Path(geoexp.__file__).parent}; {args.trials} trials x "
        f"{args.draws} draws per test ({full} with standard errors and intervals); probabilities from {args.prob_draws} draws; "
        f"NB dispersion {args.dispersion:g}; seed {args.seed}",
        flush=True,
    )
    region = load_sample_region()
    tables = []
    units = graph = None
    total = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        base = demo_spec(region.path, tmp).to_dict()
        base["draws"] = args.prob_draws
        for kind in kinds:
            data = copy.deepcopy(base)
            data["name"] = f"calibration: {kind}"
            data["assignment"], rerandomize = DESIGNS[kind]
            if rerandomize:
                data["rerandomize"] = rerandomize
            spec = DesignSpec.from_dict(data, base_dir=tmp, source=f"calibration {kind}")
            t0 = time.perf_counter()
            # the kept-apart design's graph reaches its gap too: reuse only equal reaches
            ctx = build_design(kind, spec, units, graph)
            units, graph = ctx.design.units, ctx.design.graph
            print(
                f"{kind}: {ctx.design.sampler.describe()} "
                f"(probabilities in {time.perf_counter() - t0:.1f} s)",
                flush=True,
            )
            index = list(DESIGNS).index(kind)
            tables.append(
                run_design(
                    kind,
                    ctx,
                    args.trials,
                    full,
                    args.draws,
                    not args.no_intervals,
                    args.dispersion,
                    args.seed,
                    index,
                    lambda s: print(s, flush=True),
                    args.outcome,
                )
            )
    table = pd.concat(tables, ignore_index=True)
    seconds = time.perf_counter() - total
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    stem = f"calibration_{dt.date.today().isoformat()}_{commit}"
    stem += ("_post" if args.outcome == "post" else "") + ("_quick" if args.quick else "")
    table.to_csv(out / f"{stem}.csv", index=False, float_format="%.6g")
    text = markdown(table, args, commit, seconds)
    (out / f"{stem}.md").write_text(text, encoding="utf-8")
    print(text)
    print(f"Wrote {out / stem}.csv and .md ({seconds:.0f} s)")
    if args.coverage_file:
        summary = coverage_summary(table, commit, [f"{stem}.csv"])
        Path(args.coverage_file).write_text(json.dumps(summary, indent=2) + "\n", encoding="utf-8")
        print(f"Wrote {args.coverage_file}")


def read_table(path) -> pd.DataFrame:
    """A table this script wrote (its scenario ``null`` read as a name, not as missing)."""
    return pd.read_csv(path, keep_default_na=False, na_values=[""])


def coverage_summary(
    table: pd.DataFrame, commit: str, sources: list[str], measured: str | None = None
) -> dict:
    """The printed intervals' coverage, lowest and highest over designs and scenarios.

    ``table`` holds one or more runs (rows of equal design, scenario and row are
    pooled, each weighted by its trials with intervals; runs with other seeds add
    independent trials). Per kind of row (``direct``: treated; ``spillover``: the
    bands) and kind of interval (``additive``: the interval printed beside the
    verdict; ``rate ratio``): the lowest and highest coverage, the Monte Carlo
    standard error of the lowest, where it was, the designs, the trials, the geoexp
    commit and the date measured. The report quotes these numbers and nothing else
    about coverage.
    """
    keys = ["design", "scenario", "row"]
    n = table["n_full_trials"].astype(float)
    pooled = []
    for col in ("cover_ri", "cover_rr"):
        ok = np.isfinite(table[col])
        part = table[ok].assign(_w=n[ok], _x=table.loc[ok, col] * n[ok])
        g = part.groupby(keys, sort=False)[["_w", "_x"]].sum()
        pooled.append((g["_x"] / g["_w"]).rename(col))
        pooled.append(g["_w"].rename(f"n_{col}"))
    cells = pd.concat(pooled, axis=1).reset_index()
    trials = int(cells["n_cover_ri"].min())
    out: dict = {
        "measured": measured or dt.date.today().isoformat(),
        "geoexp_commit": commit,
        "tables": sources,
        "designs": sorted(set(cells["design"])),
        "trials_with_intervals": trials,
        "draws_per_test": int(table["n_draws"].min()),
        "level": LEVEL,
        "coverage": {},
    }
    band = cells["row"].str.startswith("spillover")
    for kind, rows in (("direct", cells[~band]), ("spillover", cells[band])):
        for name, col in (("additive", "cover_ri"), ("rate ratio", "cover_rr")):
            got = rows[np.isfinite(rows[col])]
            if got.empty:
                continue
            lo, hi = got[col].idxmin(), got[col].idxmax()
            p, m = float(got.at[lo, col]), float(got.at[lo, f"n_{col}"])
            out["coverage"][f"{kind}, {name}"] = {
                "lowest": round(p, 4),
                "lowest_mc_se": round(float(np.sqrt(p * (1 - p) / m)), 4),
                "lowest_at": f"{got.at[lo, 'design']}, {got.at[lo, 'scenario']}, "
                f"{got.at[lo, 'row']}",
                "highest": round(float(got.at[hi, col]), 4),
                "cells": int(len(got)),
            }
    return out


# ---------------------------------------------------------------- the report


def _pct(x: float, se: float | None = None, digits: int = 1) -> str:
    if not np.isfinite(x):
        return "-"
    s = f"{100 * x:.{digits}f}%"
    return s + (f" ± {100 * se:.{digits}f}" if se is not None and np.isfinite(se) else "")


def _ratio(x: float) -> str:
    return f"{x:.2f}" if np.isfinite(x) else "-"


def _num(x: float, digits: int = 3) -> str:
    return f"{x:+.{digits}f}" if np.isfinite(x) else "-"


def _bias(row, tag: str) -> str:
    b, se = row[f"bias_pct_{tag}"], row[f"mcse_bias_pct_{tag}"]
    return f"{b:+.0f}% ± {se:.0f}" if np.isfinite(b) else "-"


def markdown(table: pd.DataFrame, args, commit: str, seconds: float) -> str:
    main = table[table["scenario"].isin(["null", "additive", "rate ratio"])]
    lines = [
        f"# Calibration of the analysis on the sample city ({dt.date.today().isoformat()}, "
        f"geoexp {commit})",
        "",
        f"{args.trials} simulated trials per design ({args.full_trials} of them with standard "
        f"errors and intervals), {args.draws} randomization draws per test, "
        f"exposure probabilities from {args.prob_draws} draws of each design; NB2 dispersion "
        f"{args.dispersion:g}; root seed {args.seed}; {seconds / 60:.1f} minutes. Outcome: "
        + (
            "change in incidents per segment (post minus pre)"
            if args.outcome == "change"
            else "post-period incidents per segment"
        )
        + ". Effects are incidents per segment; ± is one "
        "Monte Carlo standard error. Rejection at alpha = 0.05; 'eq-tailed' is the library's "
        "two-sided rule (equal-tailed), 'absolute' the rule |T| >= |t| from the same draws. "
        "Each row is over the analysis's units for it (treated: eligible units; bands: units "
        "that are never treated; both probabilities at least the positivity floor). "
        "'cover RI' is the interval printed beside the verdict (test inversion, other "
        "effects at their estimates); 'cover RR' the rate ratio's inverted interval against the "
        "planted ratio (1 under no effect; treated 0.7, band 1 0.9 under rate ratios).",
        "",
        "## Estimates and intervals",
        "",
        "| design | scenario | row | units | planted | Hajek mean | Hajek bias | HT mean | HT bias "
        "| Hajek SE/SD | HT SE/SD | cover Hajek | cover HT | cover RI | cover RR |",
        "|---|---|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for _, r in main.iterrows():
        lines.append(
            f"| {r.design} | {r.scenario} | {r.row} | {r.n_units} | {_num(r.planted)} "
            f"| {_num(r.mean_hajek)} "
            f"| {_bias(r, 'hajek')} | {_num(r.mean_ht)} | {_bias(r, 'ht')} "
            f"| {_ratio(r.se_over_sd_hajek)} | {_ratio(r.se_over_sd_ht)} "
            f"| {_pct(r.cover_hajek, r.mcse_cover_hajek, 0)} | {_pct(r.cover_ht, r.mcse_cover_ht, 0)} "
            f"| {_pct(r.cover_ri, r.mcse_cover_ri, 0)} | {_pct(r.cover_rr, r.mcse_cover_rr, 0)} |"
        )
    lines += [
        "",
        "## Tests: size (null) and power",
        "",
        "| design | scenario | row | verdict's test | rate ratio test | Fisher eq-tailed "
        "| Fisher absolute | no-spillover eq-tailed | no-spillover absolute |",
        "|---|---|---|---:|---:|---:|---:|---:|---:|",
    ]
    for _, r in main.iterrows():
        lines.append(
            f"| {r.design} | {r.scenario} | {r.row} "
            f"| {_pct(r.reject_row, r.mcse_reject_row)} "
            f"| {_pct(r.reject_rr, r.mcse_reject_rr)} "
            f"| {_pct(r.reject_fisher_eq, r.mcse_reject_fisher_eq)} "
            f"| {_pct(r.reject_fisher, r.mcse_reject_fisher)} "
            f"| {_pct(r.reject_spill_eq, r.mcse_reject_spill_eq)} "
            f"| {_pct(r.reject_spill, r.mcse_reject_spill)} |"
        )
    grid = table[table["scenario"].str.startswith("shift") & (table["row"] == table["row"].iloc[0])]
    lines += [
        "",
        "## Rejection rate against a planted additive effect on treated segments (Fisher test)",
        "",
        "Each cell: absolute rule |T| >= |t| / equal-tailed rule (the library's). Flagged (!) "
        "where the absolute rule rejects less often than alpha.",
        "",
        "| design | " + " | ".join(f"{s:+g}" for s in SHIFTS) + " |",
        "|---|" + "---:|" * len(SHIFTS),
    ]
    for design, part in grid.groupby("design", sort=False):
        cells = []
        for shift in SHIFTS:
            r = part[part["scenario"] == f"shift {shift:+g}"].iloc[0]
            flag = " (!)" if r.reject_fisher < ALPHA else ""
            cells.append(f"{_pct(r.reject_fisher, None, 1)}{flag} / {_pct(r.reject_fisher_eq)}")
        lines.append(f"| {design} | " + " | ".join(cells) + " |")
    lines += ["", "## Beside the baseline figures", ""] + baseline_lines(table)
    lines += [
        "",
        "Targets: |bias| <= 10% of the planted effect for treated and band 1 (default "
        "estimator); size within 2 MC SE of 5%; rejection >= alpha at every planted effect; "
        "coverage >= 93% for every printed interval. See README.md.",
        "",
    ]
    return "\n".join(lines)


def baseline_lines(table: pd.DataFrame) -> list[str]:
    """This run's figures beside the ones measured before."""
    out = []
    eff = table[table["scenario"].isin(["additive", "rate ratio"])]
    direct_band1 = eff[eff["row"].isin(eff["row"].unique()[:2])]
    parts = []
    for design, part in direct_band1.groupby("design", sort=False):
        b = part["bias_pct_hajek"].abs()
        parts.append(f"{design} {b.min():.0f}-{b.max():.0f}%")
    out.append(
        f"- Before: {BASELINE['hajek_bias']}. Now (|bias|, treated and band 1): "
        + "; ".join(parts)
        + "."
    )

    def pick(design, scen, row_i):
        part = table[(table.design == design) & (table.scenario == scen)]
        return part.iloc[row_i] if len(part) > row_i else None

    r = pick("complete", "additive", 0)
    if r is not None:
        out.append(
            f"- Before: {BASELINE['complete_minus5']}. Now: {r.mean_hajek:+.2f} ± "
            f"{r.mcse_mean_hajek:.2f} (planted {r.planted:+.2f})."
        )
    r = pick("complete", "additive", 1)
    if r is not None:
        out.append(
            f"- Before: {BASELINE['complete_band1']}. Now: {r.mean_hajek:+.3f} ± "
            f"{r.mcse_mean_hajek:.3f} (planted {r.planted:+.3f})."
        )
    r = pick("apart", "shift -10", 0)
    if r is not None:
        out.append(
            f"- Before: {BASELINE['demo_minus10']}. Now: absolute rule "
            f"{_pct(r.reject_fisher, r.mcse_reject_fisher)}, equal-tailed "
            f"{_pct(r.reject_fisher_eq, r.mcse_reject_fisher_eq)}."
        )
    bands = table[table["scenario"].isin(["null", "additive", "rate ratio"])]
    bands = bands[bands["row"] != bands["row"].iloc[0]]
    if len(bands) and bands["se_over_sd_hajek"].notna().any():
        ratio = bands["se_over_sd_hajek"]
        out.append(
            f"- Before: {BASELINE['se_ratio']}. Now (Hajek, bands, all scenarios): "
            f"{ratio.min():.1f}-{ratio.max():.1f}x."
        )
    null = table[table["scenario"] == "null"]
    sizes = pd.concat([null["reject_fisher_eq"], null["reject_spill_eq"]]).dropna()
    out.append(
        f"- Before: {BASELINE['size']}. Now (equal-tailed rule, every design and row): "
        f"{_pct(sizes.min())}-{_pct(sizes.max())}."
    )
    return out


if __name__ == "__main__":
    main()
