"""Design check: can this design answer its questions? Answered before anything reaches the street."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from geoexp._moran import moran
from geoexp._rng import Stream
from geoexp._tables import markdown_table, plural, text_table
from geoexp.design._network_check import network_check
from geoexp.errors import DesignError
from geoexp.exposure import (
    Estimand,
    ExposureProbabilities,
    PositivityReport,
    contrast_units,
)

if TYPE_CHECKING:
    from geoexp.design._assignment import Assignment
    from geoexp.design._design import Design

# Absolute standardized difference above which a covariate is called imbalanced.
BALANCE_THRESHOLD = 0.1  # common practice (a rule of thumb of the trade)
# Fewer expected units than this in a condition per draw makes its estimate unreliable.
MIN_EXPECTED_UNITS = 10
# Exposure probabilities below this give inverse-probability weights above 20.
SMALL_PROBABILITY = 0.05
# Coefficient of variation over draws of the number treated above which the direct effect's
# Hajek estimate is not called reliable: its denominator is then random, and Hartley & Ross
# (1954) bound a ratio estimator's bias by this CV times the estimator's standard deviation.
# At 0.1 the bias stays below a tenth of any effect at least one standard error in size.
MAX_TREATED_CV = 0.1


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
    coordinates
        The units' CRS as outputs name it ("local planar coordinates in
        metres (no CRS)" for a layer declared planar).
    network
        :class:`geoexp.graph.NetworkDiagnostics` of a design measured along
        streets (components, units without neighbours, crossings), else None.
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
    coordinates: str = ""
    network: object = None
    balance_draws: dict = field(default_factory=dict)

    def __str__(self) -> str:
        parts = [
            f"Design check: {self.name} (design {self.spec_hash[:12]})",
            f"{plural(self.n_units, 'unit')}, {self.n_eligible:,} eligible; "
            f"{plural(self.n_draws, 'Monte Carlo draw')} of the design's own sampler.",
            f"Coordinates: {self.coordinates}." if self.coordinates else "",
            "",
            *self._network_lines(),
            "Expected units per condition:",
            text_table(self.expected),
            "",
            "Exposure probabilities (units that can be in each condition):",
            text_table(self.probability_summary),
            "",
            str(self.positivity),
            "",
            str(self.autocorrelation) if self.autocorrelation is not None else "",
            "",
            "Balance (standardized differences; |d| > 0.1 is flagged):",
            text_table(self.balance) if len(self.balance) else "  (no covariates)",
            "",
            "Verdict:",
            *(f"- {line}" for line in self.verdict),
        ]
        return "\n".join(parts)

    def _network_lines(self) -> list[str]:
        if self.network is None:
            return []
        return [str(self.network), ""]

    def to_markdown(self) -> str:
        """The check as a Markdown section."""

        return "\n".join(
            [
                f"## Design check: {self.name}",
                "",
                f"Design `{self.spec_hash[:12]}`; {plural(self.n_units, 'unit')}, "
                f"{self.n_eligible:,} eligible; {plural(self.n_draws, 'draw')}."
                + (f" Coordinates: {self.coordinates}." if self.coordinates else ""),
                "",
                *(["### Street network", *self._network_lines()] if self.network else []),
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
        numeric = frame.drop(columns="geometry").select_dtypes("number")
        chosen = [c for c in numeric.columns if not _identifier_like(c, numeric[c])][:6]
    return chosen


def _identifier_like(name: str, values: pd.Series) -> bool:
    # An identifier or a row number says nothing about balance: a column named like an id,
    # or whole numbers that are all different (a code per unit).
    lowered = str(name).lower()
    if lowered in {"id", "fid", "objectid", "row"} or lowered.endswith(("_id", "id")):
        return True
    return pd.api.types.is_integer_dtype(values) and values.is_unique and len(values) > 1


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

    Parameters
    ----------
    design : Design
        The design to check.
    n_draws : int, optional
        Draws of the design's sampler (default: the spec's ``draws``).
    assignment : Assignment, optional
        A drawn assignment, whose condition sizes are shown beside the
        expected ones.
    balance_columns : list of str, optional
        Covariates to check balance on (default: the hot-spot column and
        rerandomization covariates, else up to six numeric columns that are not
        identifiers).

    Returns
    -------
    DesignCheck
        Expected number of units per condition, exposure probabilities,
        positivity, standardised balance differences and the verdict.

    Raises
    ------
    geoexp.errors.DesignError
        A balance column is missing from the unit layer or has missing values.
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
    network = network_check(design)
    if network is not None:
        for line in reversed(network.warnings):
            verdict.insert(0, f"Street network: {line}")
        if network.sparse:
            verdict.insert(
                0,
                "The along-street graph is implausibly sparse: drawing is refused"
                + (
                    " unless [exposure] accept_sparse_network = true (it is: the draw goes ahead)."
                    if design.spec.exposure.accept_sparse_network
                    else "; set [exposure] accept_sparse_network = true to draw anyway."
                ),
            )
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
        coordinates=design.units.crs_label,
        network=network,
        balance_draws=balance_draws,
    )


def _autocorrelation(design: Design, x: np.ndarray, cols: list[str]):
    """Moran's I of the first balance column within the first band, if it varies."""
    if not cols or np.ptp(x[:, 0]) == 0:
        return None
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


def _suggestions(estimand: Estimand, thin: str, direct: bool) -> str:
    """Design changes that would help the thin side of a contrast."""
    if thin == "reference":
        return (
            "fewer treated units, a smaller gap between treated units, or a randomized-saturation "
            "design with pure-control clusters (more units that are often pure controls)"
        )
    if direct:
        return "more treated units"
    return "a bigger band or more treated units (more units that are often in the band)"


def _treated_count_line(cv: float, n_clusters: int | None) -> str:
    """Why a random number of treated units makes the direct Hajek estimate unreliable."""
    where = (
        f"which of the {n_clusters} clusters draw which saturation" if n_clusters else "the draw"
    )
    return (
        f" Not reliably estimable by the default (Hajek) estimator: the number of treated "
        f"units varies with {where} (coefficient of variation {cv:.2f} over the design's "
        "draws), so the estimator is a ratio with a random denominator; its bias can reach "
        f"{cv:.2f} times its standard error (Hartley & Ross 1954), and in simulations of such "
        "a design on an invented city it exceeded a tenth of the planted effect. The "
        "Horvitz-Thompson estimate (the analysis's estimator option, and in its results "
        "layer) is unbiased but noisier. Would help: clusters of equal size, more "
        "clusters, or a blocked design (a fixed share treated in every block) for the "
        "direct effect."
    )


def _row_line(
    head: str, estimand: Estimand, *, direct: bool, treated_cv: float = 0.0, n_clusters=None
) -> str:
    """What the design check says about one contrast row: its units, weights and estimability.

    A contrast is called estimable only when both sides' expected Kish (1965)
    effective sample size over the row's units reaches :data:`MIN_EXPECTED_UNITS`;
    units whose probability of either condition is below the positivity floor
    leave the estimand, and the line says how many and why (their weights
    would make the Hajek estimate biased toward zero and unstable). The direct
    effect is also refused when the number treated varies over the design's
    draws by more than :data:`MAX_TREATED_CV` (``treated_cv``): the Hajek
    estimate is then a ratio with a random denominator, biased by up to that
    coefficient of variation times its standard deviation (Hartley & Ross 1954).
    """
    e = estimand
    line = (
        f"{head} Over {e.who}: expected effective sample sizes {e.expected_ess_exposure:.0f} "
        f"({e.exposure_label}) and {e.expected_ess_reference:.0f} ({e.reference_label}) per draw"
        f" (Kish); left out: {e.left_out}."
    )
    ess = {"exposure": e.expected_ess_exposure, "reference": e.expected_ess_reference}
    thin = min(ess, key=lambda side: ess[side])
    side = e.exposure_label if thin == "exposure" else e.reference_label
    if e.n_units < MIN_EXPECTED_UNITS or ess[thin] < MIN_EXPECTED_UNITS:
        line += (
            f" Not reliably estimable: the {side} side's weights are extreme (expected effective "
            f"sample size {ess[thin]:.1f} of {e.n_units} units; at least {MIN_EXPECTED_UNITS} "
            f"needed). Would help: {_suggestions(e, thin, direct)}."
        )
    elif direct and treated_cv > MAX_TREATED_CV:
        line += _treated_count_line(treated_cv, n_clusters)
    elif e.n_below_floor + e.n_never_reference > 0.2 * max(e.n_candidates, 1):
        line += (
            f" Estimable only for the {e.n_units} units kept: "
            f"{e.n_below_floor + e.n_never_reference} units cannot be compared with stable "
            f"weights and leave the estimand. Would help: {_suggestions(e, thin, direct)}."
        )
    else:
        line += " Estimable."
    return line


def _treated_cv(sizes: np.ndarray | None) -> float:
    """Coefficient of variation of the number treated over the draws (0 when it is fixed)."""
    if sizes is None or not len(sizes):
        return 0.0
    n = np.asarray(sizes, dtype=float)[:, 0]
    return float(n.std() / n.mean()) if n.mean() > 0 else 0.0


def _n_clusters(design: Design) -> int | None:
    """Number of clusters of a randomized-saturation design (None for other designs)."""
    sampler: object = design.sampler
    while not hasattr(sampler, "cluster_codes") and hasattr(sampler, "base"):
        sampler = sampler.base
    codes = getattr(sampler, "cluster_codes", None)
    if codes is None:
        return None
    return int(np.unique(np.asarray(codes)).size)


def _verdict(design, probs, expected, positivity, balance) -> list[str]:
    mapping = design.mapping
    pc = mapping.pure_control
    p = probs.probabilities
    lines = []
    elig = design.eligible
    floor = design.positivity_floor
    exp_t = expected["expected_units"].iloc[0]
    exp_c = expected["expected_eligible"].iloc[pc]
    direct = contrast_units(p, elig, 0, pc, labels=mapping.labels, group="eligible", floor=floor)
    head = (
        f"Direct effect (treated vs pure control): about {exp_t:.0f} treated and {exp_c:.0f} "
        f"eligible pure controls per draw."
    )
    lines.append(
        _row_line(
            head,
            direct,
            direct=True,
            treated_cv=_treated_cv(probs.condition_sizes),
            n_clusters=_n_clusters(design),
        )
    )
    for k in range(1, pc):
        e_k = expected["expected_units"].iloc[k]
        focal = contrast_units(
            p, elig, k, pc, labels=mapping.labels, group="never-eligible", floor=floor
        )
        head = (
            f"Spillover, {mapping.labels[k]} (vs pure control): about {e_k:.0f} units per draw in "
            "this band."
        )
        lines.append(_row_line(head, focal, direct=False))
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
                gap = abs(row["drawn"] - row["mean_over_draws"])
                lines.append(
                    f"The drawn assignment differs by chance from the design's average on {cov} "
                    f"for '{contrast}': standardized difference d = {row['drawn']:+.2f} against "
                    f"{row['mean_over_draws']:+.2f} over the design's draws, a gap of {gap:.2f} "
                    f"(more than the {BALANCE_THRESHOLD} rule of thumb). The randomization tests "
                    "allow for chance imbalance. To limit it, add [rerandomize] with this column "
                    "to the design and draw again with a reason; never change the seed to get a "
                    "nicer draw."
                )
    lines.append(
        f"Units that can never be treated ({plural(int((~elig).sum()), 'non-eligible unit')}) enter only as "
        "spillover or pure-control units; the design says nothing about treating them."
    )
    return lines
