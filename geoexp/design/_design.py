"""A design: a spec resolved against its units, with its graph, mapping and sampler."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import Literal

import numpy as np
import pandas as pd

from geoexp._rng import RngLike, Stream, purpose_sequence
from geoexp.design._assignment import Assignment
from geoexp.design._build import build_sampler, eligible_for, units_for
from geoexp.design._fingerprint import DesignFingerprint, design_fingerprint
from geoexp.design._limits import MIN_DRAWS, check_draws
from geoexp.design._protocol import Sampler, fixed_treated
from geoexp.design._spec import DesignSpec
from geoexp.errors import DesignError, InfeasibleDesignError
from geoexp.exposure import (
    DEFAULT_FLOOR,
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

    Build it with :meth:`from_spec` (or from a trial file with
    :func:`geoexp.trialfile.design_from_trial`).
    """

    spec: DesignSpec
    units: UnitSet
    eligible: np.ndarray
    graph: ExposureGraph
    mapping: ExposureMapping
    sampler: Sampler
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
            units = units_for(spec)
        notes.append(units.crs_report)
        if eligible is None:
            eligible_units = eligible_for(spec, units)
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
                split_at_crossings=spec.exposure.split_at_crossings,
                bridge_column=spec.exposure.bridge_column,
            )
        elif graph.max_distance + 1e-9 < reach or not graph.ids.equals(units.ids):
            raise DesignError(
                f"the graph passed in covers {graph.max_distance:g} m over {graph.n} units; the "
                f"design needs {reach:g} m over the {units.n} units of its layer"
            )
        sampler = build_sampler(spec, units, eligible, graph, mapping)
        notes.append(sampler.describe())
        design = cls(spec, units, eligible, graph, mapping, sampler, tuple(notes))
        design.check_draws(spec.draws, what="draws", minimum=MIN_DRAWS)
        return design

    def check_draws(self, n_draws: object, *, what: str = "n_draws", minimum: int = 1) -> int:
        """``n_draws`` as an int, refused when not whole, too many or beyond memory.

        See :func:`geoexp.design.check_draws`; the memory estimate uses this
        design's units, conditions and (largest) number of treated units.
        """
        treated = fixed_treated(self.sampler)
        return check_draws(
            n_draws,
            n_treated=int(self.eligible.sum()) if treated is None else treated,
            n_units=self.units.n,
            n_conditions=self.mapping.n_conditions,
            minimum=minimum,
            what=what,
        )

    @property
    def seed_streams(self) -> tuple[np.random.SeedSequence, np.random.SeedSequence]:
        """(assignment stream, Monte Carlo stream), both children of the spec's seed."""
        return self.stream(Stream.ASSIGNMENT), self.stream(Stream.MONTE_CARLO)

    def stream(self, purpose: Stream, index: int = 0) -> np.random.SeedSequence:
        """The spec seed's stream for ``purpose`` (and ``index``: a band, a contrast); see Stream."""
        return purpose_sequence(np.random.SeedSequence(self.spec.seed), purpose, index)

    @property
    def positivity_floor(self) -> float:
        """The analysis's positivity floor: ``[exposure] positivity_floor``, else 0.05."""
        floor = self.spec.exposure.positivity_floor
        return DEFAULT_FLOOR if floor is None else float(floor)

    @property
    def fingerprint(self) -> DesignFingerprint:
        """The design's identity over its spec, units, used columns, zones and tool version."""
        return design_fingerprint(self.spec, self.units, self.eligible)

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
        n_draws = self.spec.draws if n_draws is None else self.check_draws(n_draws)
        return exposure_probabilities(
            self.sampler,
            self.graph,
            self.mapping,
            n_draws,
            self.seed_streams[1] if rng is None else rng,
            covariates=covariates,
            engine=engine,
        )

    def check(self, n_draws: int | None = None, assignment: Assignment | None = None):
        """Diagnose the design before it reaches the street; see :func:`check_design`."""
        from geoexp.design._check import check_design

        return check_design(self, n_draws=n_draws, assignment=assignment)
