"""A design: a spec resolved against its units, with its graph, mapping and sampler."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import Literal

import numpy as np
import pandas as pd

from geoexp._rng import RngLike, Stream, purpose_sequence
from geoexp.design._assignment import Assignment
from geoexp.design._floor import PureControlFloor
from geoexp.design._samplers import (
    BlockedSampler,
    CompleteSampler,
    Rerandomized,
    SaturationSampler,
    SeparatedSampler,
)
from geoexp.design._spec import DesignSpec
from geoexp.errors import DesignError, InfeasibleDesignError
from geoexp.exposure import (
    ExposureMapping,
    ExposureProbabilities,
    assign_conditions,
    exposure_probabilities,
)
from geoexp.graph import ExposureGraph
from geoexp.units import UnitSet


@dataclass(frozen=True, eq=False)
class Design:
    """A design spec resolved against its units: eligibility, exposure graph and sampler.

    The sampler is a definite random procedure that can be drawn again and
    again. The assignment drawn for the trial and every Monte Carlo draw
    (exposure probabilities, power, randomization tests) come from the same
    sampler, seeded from the spec's seed: the first child stream of
    ``SeedSequence(seed)`` draws the assignment, the second the Monte Carlo.

    Build it with :meth:`from_spec`.
    """

    spec: DesignSpec
    units: UnitSet
    eligible: np.ndarray
    graph: ExposureGraph
    mapping: ExposureMapping
    sampler: object
    notes: tuple[str, ...] = ()

    @classmethod
    def from_spec(
        cls,
        spec: DesignSpec,
        *,
        units: UnitSet | None = None,
        graph: ExposureGraph | None = None,
        eligible: np.ndarray | None = None,
    ) -> Design:
        """Resolve a spec: read the units, select the eligible ones, build the graph and sampler.

        ``units`` and ``graph`` may be passed to reuse ones already built (they
        must be the spec's layer and wide enough for its bands and gap);
        ``eligible`` (a boolean mask over the units) replaces the spec's
        eligibility rules, as when a design is rebuilt from its trial file.
        """
        notes: list[str] = []
        if units is None:
            units = spec.read_units()
        notes.append(units.crs_report)
        if eligible is None:
            eligible_units = spec.eligible_units(units)
            notes.extend(n for n in eligible_units.notes if n not in units.notes)
            eligible = np.asarray(units.ids.isin(eligible_units.ids))
        else:
            eligible = np.asarray(eligible, dtype=bool)
            if eligible.shape != (units.n,):
                raise DesignError(f"eligible must be a mask over the {units.n} units")
            notes.append(f"{int(eligible.sum())} eligible units as recorded")
        if not eligible.any():
            raise InfeasibleDesignError(
                f"no unit of {units.source!r} is eligible after the rules in [eligible]"
            )
        mapping = ExposureMapping(
            tuple(spec.exposure.bands_m), spec.exposure.metric, spec.exposure.unit
        )
        gap = spec.assignment.gap_m or 0.0
        reach = max(mapping.reach, gap)
        if graph is None:
            graph = ExposureGraph.from_units(
                units,
                reach,
                metric=spec.exposure.metric,
                snap_tolerance=spec.exposure.snap_tolerance_m,
            )
        elif graph.max_distance + 1e-9 < reach or not graph.ids.equals(units.ids):
            raise DesignError(
                f"the graph passed in covers {graph.max_distance:g} m over {graph.n} units; the "
                f"design needs {reach:g} m over the {units.n} units of its layer"
            )
        sampler = _build_sampler(spec, units, eligible, graph, mapping)
        notes.append(sampler.describe())
        return cls(spec, units, eligible, graph, mapping, sampler, tuple(notes))

    @property
    def seed_streams(self) -> tuple[np.random.SeedSequence, np.random.SeedSequence]:
        """(assignment stream, Monte Carlo stream), both children of the spec's seed."""
        return self.stream(Stream.ASSIGNMENT), self.stream(Stream.MONTE_CARLO)

    def stream(self, purpose: Stream, index: int = 0) -> np.random.SeedSequence:
        """The spec seed's stream for ``purpose`` (and ``index``: a band, a contrast); see Stream."""
        return purpose_sequence(np.random.SeedSequence(self.spec.seed), purpose, index)

    @classmethod
    def from_trial(cls, trial) -> tuple[Design, Assignment]:
        """Rebuild a trial's design from its trial file, with its stored assignment.

        The units, their eligibility and the spec come from the file itself, so
        the analysis does not depend on the original layer still being around.
        The spec's seed is drawn again and must give the stored assignment;
        if it does not, the file was altered or the environment differs, and
        the analysis refuses rather than use probabilities of another design.
        """
        from geoexp.trialfile import TrialFile

        tf = trial if isinstance(trial, TrialFile) else TrialFile.open(trial)
        if not tf.is_locked:
            raise DesignError(f"trial file {str(tf.path)!r} holds no drawn assignment yet")
        frame = tf.units()
        eligible = frame["eligible"].astype(bool).to_numpy()
        units = UnitSet.from_frame(
            frame.drop(columns=["eligible"]), None, source=f"{tf.path} (units layer)"
        )
        design = cls.from_spec(tf.spec(), units=units, eligible=eligible)
        stored = tf.assignment().reindex(units.ids)
        treated = stored["treated"].astype(bool).to_numpy()
        again = design.draw()
        if not np.array_equal(again.treated, treated):
            raise DesignError(
                f"the assignment stored in {str(tf.path)!r} is not the one its spec and seed "
                f"draw ({int((again.treated != treated).sum())} units differ). The file may have "
                "been edited by hand; geoexp will not analyse it with another design's probabilities."
            )
        assignment = Assignment(
            ids=units.ids,
            treated=treated,
            conditions=again.conditions,
            eligible=eligible,
            mapping=design.mapping,
            spec_hash=design.spec.hash,
            seed=design.spec.seed,
            drawn_at=tf.meta.get("drawn_at", ""),
            extra=again.extra,
        )
        return design, assignment

    @property
    def eligible_ids(self) -> pd.Index:
        """Ids of the units that may be treated."""
        return self.units.ids[self.eligible]

    def draw(self) -> Assignment:
        """Draw the trial's assignment from the spec's seed (same spec and seed, same result)."""
        draws = self.sampler.draw_many(1, self.seed_streams[0])
        treated_pos = np.asarray(draws.treated(0))
        treated = np.zeros(self.units.n, dtype=bool)
        treated[treated_pos] = True
        return Assignment(
            ids=self.units.ids,
            treated=treated,
            conditions=assign_conditions(self.graph, self.mapping, treated_pos),
            eligible=self.eligible.copy(),
            mapping=self.mapping,
            spec_hash=self.spec.hash,
            seed=self.spec.seed,
            drawn_at=dt.datetime.now(dt.UTC).replace(microsecond=0).isoformat(),
            extra={key: np.asarray(value)[0] for key, value in draws.extra.items()},
        )

    def probabilities(
        self,
        n_draws: int | None = None,
        rng: RngLike = None,
        *,
        covariates: pd.DataFrame | None = None,
        engine: Literal["auto", "numba", "numpy"] = "auto",
    ) -> ExposureProbabilities:
        """Exposure probabilities from the design's own sampler (default: the spec's draws and seed)."""
        return exposure_probabilities(
            self.sampler,
            self.graph,
            self.mapping,
            n_draws or self.spec.draws,
            self.seed_streams[1] if rng is None else rng,
            covariates=covariates,
            engine=engine,
        )

    def check(self, n_draws: int | None = None, assignment: Assignment | None = None):
        """Diagnose the design before it reaches the street; see :func:`check_design`."""
        from geoexp.design._check import check_design

        return check_design(self, n_draws=n_draws, assignment=assignment)


def _labels(units: UnitSet, column: str, eligible: np.ndarray, what: str) -> np.ndarray:
    if column not in units.frame.columns:
        raise DesignError(
            f"{what} column {column!r} is not in {units.source!r}; its columns are "
            f"{[c for c in units.frame.columns if c != 'geometry']}"
        )
    values = units.frame[column].to_numpy()[eligible]
    missing = pd.isna(values)
    if missing.any():
        bad = units.ids[eligible][missing]
        raise DesignError(
            f"{what} column {column!r} of {units.source!r} is empty for {int(missing.sum())} "
            f"eligible units, e.g. {list(bad[:10])}"
        )
    return values.astype(str)


def _round_half_up(x: np.ndarray | float) -> np.ndarray:
    return np.floor(np.asarray(x, dtype=float) + 0.5).astype(int)


def _quotas(spec: DesignSpec, blocks: np.ndarray) -> dict[str, int]:
    a = spec.assignment
    labels, sizes = np.unique(blocks, return_counts=True)
    if a.block_quotas:
        unknown = sorted(set(map(str, a.block_quotas)) - set(labels))
        if unknown:
            raise DesignError(
                f"[assignment.block_quotas] names blocks {unknown} that have no eligible units; "
                f"blocks with eligible units: {list(labels)}"
            )
        return {str(k): int(a.block_quotas.get(k, 0)) for k in labels}
    if a.block_treated is not None:
        return {k: int(a.block_treated) for k in labels}
    # round half up, so a share of 0.5 of 3 units treats 2 (stated in the check report)
    return dict(zip(labels, _round_half_up(a.block_share * sizes).tolist(), strict=True))


def _gap_csr(graph: ExposureGraph, gap: float) -> tuple[np.ndarray, np.ndarray]:
    """CSR of the pairs strictly closer than ``gap`` (a pair exactly at the gap is allowed)."""
    near = graph.within(gap, closed=False)
    return near.indptr, near.indices


def _build_sampler(spec, units, eligible, graph, mapping):
    a = spec.assignment
    n = units.n
    elig_pos = np.flatnonzero(eligible)
    n_e = elig_pos.size
    blocks = None
    if a.method == "complete":
        m = int(a.treated) if a.treated is not None else int(_round_half_up(a.share * n_e))
        quotas = None
    elif a.method == "blocked":
        blocks = _labels(units, a.block_column, eligible, "block")
        quotas = _quotas(spec, blocks)
        m = sum(quotas.values())
    if a.method == "saturation":
        clusters = _labels(units, a.cluster_column, eligible, "cluster")
        sampler = SaturationSampler(
            n, elig_pos, clusters, tuple(a.saturations), tuple(a.cluster_counts)
        )
    elif a.gap_m is not None:
        gap_indptr, gap_indices = _gap_csr(graph, a.gap_m)
        sampler = SeparatedSampler(
            n,
            elig_pos,
            n_treated=m if quotas is None else None,
            gap_graph=(gap_indptr, gap_indices),
            blocks=blocks,
            quotas=quotas,
            gap=a.gap_m,
        )
    elif a.method == "blocked":
        sampler = BlockedSampler(n, elig_pos, blocks, quotas)
    else:
        sampler = CompleteSampler(n, elig_pos, m)
    if spec.rerandomize is not None:
        cols = list(spec.rerandomize.covariates)
        missing = [c for c in cols if c not in units.frame.columns]
        if missing:
            raise DesignError(
                f"[rerandomize] covariates {missing} are not columns of {units.source!r}"
            )
        x = units.frame[cols].to_numpy(dtype=float)[eligible]
        sampler = Rerandomized(sampler, x, spec.rerandomize.acceptance, covariate_names=tuple(cols))
    if a.min_pure_controls:
        sampler = PureControlFloor(sampler, graph, mapping, eligible, int(a.min_pure_controls))
    return sampler
