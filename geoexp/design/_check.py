"""Design check: can this design answer its questions? Answered before anything reaches the street."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from geoexp._rng import Stream
from geoexp._tables import markdown_table
from geoexp.errors import DesignError
from geoexp.exposure import ExposureProbabilities, PositivityReport

if TYPE_CHECKING:
    from geoexp.design._assignment import Assignment
    from geoexp.design._design import Design

# Absolute standardized difference above which a covariate is called imbalanced.
BALANCE_THRESHOLD = 0.1  # common practice (a rule of thumb of the trade)
# Fewer expected units than this in a condition per draw makes its estimate unreliable.
MIN_EXPECTED_UNITS = 10
# Exposure probabilities below this give inverse-probability weights above 20.
SMALL_PROBABILITY = 0.05


@dataclass(frozen=True, eq=False)
class DesignCheck:
    """What a design can and cannot estimate, from Monte Carlo draws of its own sampler.

    Attributes
    ----------
    name, spec_hash
        The trial's name and the spec's content hash.
    n_units, n_eligible, n_draws
        Units in the layer, units that may be treated, Monte Carlo draws.
    expected
        Per condition: expected units per draw (all, and eligible only), and
        the count in the drawn assignment when one is given.
    probability_summary
        Per condition: how many units can be in it, and quantiles of their
        probabilities.
    positivity
        Units that fall out of each contrast.
    balance
        Standardized differences of covariates between contrasted conditions:
        mean over draws, 2.5% and 97.5% points over draws, and the drawn value.
    verdict
        Plain-language lines: what the design can and cannot estimate.
    probabilities
        The full per-unit probabilities.
    balance_draws
        Per contrast (the balance table's ``contrast``), the standardized
        difference of each covariate in every Monte Carlo draw (draws x
        covariates), for the balance figure.
    """

    name: str
    spec_hash: str
    n_units: int
    n_eligible: int
    n_draws: int
    expected: pd.DataFrame
    probability_summary: pd.DataFrame
    positivity: PositivityReport
    balance: pd.DataFrame
    verdict: tuple[str, ...]
    notes: tuple[str, ...]
    probabilities: ExposureProbabilities
    autocorrelation: object = None
    balance_draws: dict = field(default_factory=dict)

    def __str__(self) -> str:
        fmt = {"float_format": lambda v: f"{v:.3f}"}
        parts = [
            f"Design check: {self.name} (design {self.spec_hash[:12]})",
            f"{self.n_units} units, {self.n_eligible} eligible; {self.n_draws} Monte Carlo draws "
            "of the design's own sampler.",
            "",
            "Expected units per condition:",
            self.expected.to_string(**fmt),
            "",
            "Exposure probabilities (units that can be in each condition):",
            self.probability_summary.to_string(**fmt),
            "",
            str(self.positivity),
            "",
            str(self.autocorrelation) if self.autocorrelation is not None else "",
            "",
            "Balance (standardized differences; |d| > 0.1 is flagged):",
            self.balance.to_string(**fmt) if len(self.balance) else "  (no covariates)",
            "",
            "Verdict:",
            *(f"- {line}" for line in self.verdict),
        ]
        return "\n".join(parts)

    def to_markdown(self) -> str:
        """The check as a Markdown section."""

        return "\n".join(
            [
                f"## Design check: {self.name}",
                "",
                f"Design `{self.spec_hash[:12]}`; {self.n_units} units, {self.n_eligible} eligible; "
                f"{self.n_draws} draws.",
                "",
                "### Expected units per condition",
                markdown_table(self.expected),
                "",
                "### Exposure probabilities",
                markdown_table(self.probability_summary),
                "",
                "### Positivity",
                *(f"- {c}" for c in self.positivity.contrasts),
                "",
                "### Balance",
                markdown_table(self.balance) if len(self.balance) else "(no covariates)",
                "",
                "### Verdict",
                *(f"- {line}" for line in self.verdict),
            ]
        )


def _balance_columns(design: Design, columns: list[str] | None) -> list[str]:
    frame = design.units.frame
    if columns is not None:
        missing = [c for c in columns if c not in frame.columns]
        if missing:
            raise DesignError(f"balance columns {missing} are not in {design.units.source!r}")
        return list(columns)
    chosen = []
    if design.spec.eligible.top_column:
        chosen.append(design.spec.eligible.top_column)
    if design.spec.rerandomize is not None:
        chosen += [c for c in design.spec.rerandomize.covariates if c not in chosen]
    if not chosen:
        numeric = frame.drop(columns="geometry").select_dtypes("number").columns
        chosen = list(numeric[:6])
    return chosen


def check_design(
    design: Design,
    *,
    n_draws: int | None = None,
    assignment: Assignment | None = None,
    balance_columns: list[str] | None = None,
) -> DesignCheck:
    """Diagnose a design: expected condition sizes, probabilities, positivity, balance, verdict.

    Every number comes from draws of the design's own sampler (the second
    child stream of the spec's seed), so it describes the procedure as
    implemented. Balance is the difference in covariate means between the
    contrasted conditions divided by the covariate's standard deviation among
    the eligible units (for treated vs pure control, compared among eligible
    units) or among all units (for spillover bands vs pure control).
    """
    cols = _balance_columns(design, balance_columns)
    frame = design.units.frame
    x = frame[cols].to_numpy(dtype=float) if cols else np.zeros((design.units.n, 0))
    if np.isnan(x).any():
        bad = design.units.ids[np.isnan(x).any(axis=1)]
        raise DesignError(f"balance columns {cols} have missing values for {list(bad[:10])}")
    e = design.eligible.astype(float)[:, None]
    cov = pd.DataFrame(np.hstack([x, x * e, e]), index=design.units.ids)
    probs = design.probabilities(n_draws, covariates=cov)
    mapping = design.mapping
    p = probs.probabilities
    labels = list(mapping.labels)

    expected = pd.DataFrame(
        {
            "expected_units": p.sum(axis=0),
            "expected_eligible": p[design.eligible].sum(axis=0),
        },
        index=labels,
    )
    if assignment is not None:
        expected["drawn"] = np.bincount(assignment.conditions, minlength=mapping.n_conditions)

    rows = []
    for k, label in enumerate(labels):
        pk = p[:, k][p[:, k] > 0]
        q_ = np.quantile(pk, [0, 0.05, 0.5, 0.95, 1]) if pk.size else [np.nan] * 5
        rows.append(
            {
                "condition": label,
                "units_possible": pk.size,
                "min": q_[0],
                "p05": q_[1],
                "median": q_[2],
                "p95": q_[3],
                "max": q_[4],
            }
        )
    summary = pd.DataFrame(rows).set_index("condition")
    positivity = probs.positivity()

    balance, balance_draws = _balance(design, probs, x, cols, assignment)
    moran = _autocorrelation(design, x, cols)
    verdict = _verdict(design, probs, expected, positivity, balance)
    if moran is not None and moran.p_value <= 0.05 and moran.statistic > 0:
        verdict.insert(
            len(verdict) - 1,
            f"{cols[0]} is spatially autocorrelated (Moran's I = {moran.statistic:+.2f} among "
            f"units within {moran.distance:g} m, p = {moran.p_value:.3f}): nearby units are "
            "alike, so methods that treat units as independent would misstate the uncertainty; "
            "geoexp's tests redraw the design itself and stay valid.",
        )
    return DesignCheck(
        name=design.spec.name,
        spec_hash=design.spec.hash,
        n_units=design.units.n,
        n_eligible=int(design.eligible.sum()),
        n_draws=probs.n_draws,
        expected=expected,
        probability_summary=summary,
        positivity=positivity,
        balance=balance,
        verdict=tuple(verdict),
        notes=design.notes,
        probabilities=probs,
        autocorrelation=moran,
        balance_draws=balance_draws,
    )


def _autocorrelation(design: Design, x: np.ndarray, cols: list[str]):
    """Moran's I of the first balance column within the first band, if it varies."""
    if not cols or np.ptp(x[:, 0]) == 0:
        return None
    from geoexp.inference import moran  # inference needs the design package: import on use

    try:
        return moran(
            design.graph,
            x[:, 0],
            distance=design.mapping.band_edges[0],
            permutations=199,
            rng=design.stream(Stream.MORAN),
        )
    except ValueError:
        return None


def _balance(design, probs, x, cols, assignment) -> tuple[pd.DataFrame, dict]:
    if not cols:
        return pd.DataFrame(), {}
    q = len(cols)
    mapping = design.mapping
    pc = mapping.pure_control
    sums, sizes = probs.covariate_sums, probs.condition_sizes
    elig = design.eligible
    sd_elig = x[elig].std(axis=0, ddof=1) if elig.sum() > 1 else np.ones(q)
    sd_all = x.std(axis=0, ddof=1)
    out = []
    with np.errstate(invalid="ignore", divide="ignore"):
        # treated vs eligible pure controls; x*e sums sit in columns q..2q, e in the last column
        mean_t = sums[:, 0, :q] / sizes[:, [0]]
        mean_c = sums[:, pc, q : 2 * q] / sums[:, pc, [2 * q]]
        per_draw = [(mapping.labels[0], (mean_t - mean_c) / sd_elig)]
        for k in range(1, pc):
            mean_k = sums[:, k, :q] / sizes[:, [k]]
            mean_pc = sums[:, pc, :q] / sizes[:, [pc]]
            per_draw.append((mapping.labels[k], (mean_k - mean_pc) / sd_all))
    drawn: dict[str, np.ndarray] = {}
    if assignment is not None:
        cond = assignment.conditions
        with np.errstate(invalid="ignore", divide="ignore"):
            ctrl = (cond == pc) & elig
            drawn[mapping.labels[0]] = (x[cond == 0].mean(axis=0) - x[ctrl].mean(axis=0)) / sd_elig
            for k in range(1, pc):
                drawn[mapping.labels[k]] = (
                    x[cond == k].mean(axis=0) - x[cond == pc].mean(axis=0)
                ) / sd_all
    for label, d in per_draw:
        for j, col in enumerate(cols):
            v = d[:, j][np.isfinite(d[:, j])]
            row = {
                "covariate": col,
                "contrast": f"{label} vs {mapping.labels[pc]}",
                "mean_over_draws": v.mean() if v.size else np.nan,
                "low_2.5%": np.quantile(v, 0.025) if v.size else np.nan,
                "high_97.5%": np.quantile(v, 0.975) if v.size else np.nan,
            }
            if assignment is not None:
                row["drawn"] = drawn[label][j]
            out.append(row)
    per_contrast = {f"{label} vs {mapping.labels[pc]}": d for label, d in per_draw}
    return pd.DataFrame(out).set_index(["covariate", "contrast"]), per_contrast


def _verdict(design, probs, expected, positivity, balance) -> list[str]:
    mapping = design.mapping
    pc = mapping.pure_control
    p = probs.probabilities
    lines = []
    elig = design.eligible
    direct = positivity.contrasts[0]
    exp_t = expected["expected_units"].iloc[0]
    exp_c = expected["expected_eligible"].iloc[pc]
    line = (
        f"Direct effect (treated vs pure control): about {exp_t:.0f} treated and {exp_c:.0f} "
        f"eligible pure controls per draw; {direct.n_units} units can be in either."
    )
    if direct.exposure_only:
        line += (
            f" {len(direct.exposure_only)} eligible units can never be pure controls (always near "
            "a treated unit) and fall out of this estimate."
        )
    if exp_c < MIN_EXPECTED_UNITS or exp_t < MIN_EXPECTED_UNITS:
        line += " Too few units on one side: the direct effect cannot be estimated reliably."
    else:
        line += " Estimable."
    lines.append(line)
    for k in range(1, pc):
        c = positivity.contrasts[k]
        e_k = expected["expected_units"].iloc[k]
        line = (
            f"Spillover, {mapping.labels[k]} (vs pure control): about {e_k:.0f} units per draw in "
            f"this band; {c.n_units} units can be in either."
        )
        if c.exposure_only:
            line += f" {len(c.exposure_only)} units can be in this band but never pure controls; they fall out."
        if e_k < MIN_EXPECTED_UNITS or c.n_units < MIN_EXPECTED_UNITS:
            line += " Too few units: this band's spillover cannot be estimated reliably."
        else:
            line += " Estimable."
        lines.append(line)
    for k in range(pc):
        both = (p[:, k] > 0) & (p[:, pc] > 0)
        small = both & ((p[:, k] < SMALL_PROBABILITY) | (p[:, pc] < SMALL_PROBABILITY))
        if small.sum() > 0.2 * max(both.sum(), 1):
            lines.append(
                f"{int(small.sum())} of {int(both.sum())} units in the {mapping.labels[k]} contrast "
                f"have a probability below {SMALL_PROBABILITY} of one condition; their weights exceed "
                f"{1 / SMALL_PROBABILITY:.0f} and will make that estimate noisy."
            )
    if len(balance):
        structural = balance[balance["mean_over_draws"].abs() > BALANCE_THRESHOLD]
        for (cov, contrast), row in structural.iterrows():
            lines.append(
                f"Units in '{contrast}' differ from pure controls on {cov} on average over draws "
                f"(d = {row['mean_over_draws']:+.2f}): a property of where the units lie, not bad luck. "
                "The probability-weighted estimators account for it; a raw comparison of means would not."
            )
        if "drawn" in balance.columns:
            off = balance[(balance["drawn"] - balance["mean_over_draws"]).abs() > BALANCE_THRESHOLD]
            for (cov, contrast), row in off.iterrows():
                lines.append(
                    f"The drawn assignment is imbalanced on {cov} for '{contrast}' "
                    f"(d = {row['drawn']:+.2f} against {row['mean_over_draws']:+.2f} on average)."
                )
    lines.append(
        f"Units that can never be treated ({int((~elig).sum())} non-eligible units) enter only as "
        "spillover or pure-control units; the design says nothing about treating them."
    )
    return lines
