"""Conditional randomization test of the null of no spillover (Athey, Eckles & Imbens 2018)."""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from geoexp._rng import RngLike, Stream
from geoexp._significance import Alternative, RandomizationTest
from geoexp.design import CompleteSampler, Draws, Sampler
from geoexp.errors import InputError
from geoexp.inference._draws import ContrastSpec, contrast_test
from geoexp.inference._statistic import Statistic

if TYPE_CHECKING:
    from geoexp.design import Design

MIN_FOCAL = 10


@dataclass(frozen=True, eq=False)
class FixedFocalSampler:
    """Complete randomization conditional on the focal units' own assignments.

    The focal units keep their observed assignment; the other eligible units
    are completely randomized with the remaining number of treated units.
    That is exactly the conditional distribution of complete randomization
    given the focal assignments (Athey, Eckles & Imbens 2018).
    """

    base: CompleteSampler
    fixed_treated: np.ndarray

    @classmethod
    def from_complete(
        cls, sampler: CompleteSampler, focal: np.ndarray, treated: np.ndarray
    ) -> FixedFocalSampler:
        """Condition a complete design on the assignment of the focal units."""
        focal = np.asarray(focal)
        fixed = np.intersect1d(focal, np.flatnonzero(treated))
        # a constructed CompleteSampler always holds its eligible positions
        assert sampler.eligible is not None
        rest = np.setdiff1d(sampler.eligible, focal)
        m = sampler.n_treated - fixed.size
        if m < 1 or m > rest.size:
            raise InputError(
                f"the focal units take {fixed.size} of the {sampler.n_treated} treated units; "
                "too few or too many remain to randomize the rest"
            )
        return cls(CompleteSampler(sampler.n_units, rest, m), fixed)

    @property
    def n_units(self) -> int:
        """Units in the layer."""
        return self.base.n_units

    def iter_chunks(
        self, n_draws: int, rng: RngLike = None, *, chunk: int | None = None
    ) -> Iterator[Draws]:
        """Draws of the non-focal units, with the focal treated units added to every draw."""
        for part in self.base.iter_chunks(n_draws, rng, chunk=chunk):
            rows = np.diff(part.indptr)
            k = self.fixed_treated.size
            indptr = np.concatenate(([0], np.cumsum(rows + k)))
            indices = np.empty(indptr[-1], dtype=np.int64)
            owner = np.repeat(np.arange(rows.size), rows)
            offset = indptr[owner] + k + (np.arange(part.indices.size) - part.indptr[owner])
            indices[offset] = part.indices
            fixed_pos = (indptr[:-1, None] + np.arange(k)).ravel()
            indices[fixed_pos] = np.tile(self.fixed_treated, rows.size)
            # keep each row ascending, as Draws promises
            row_of = np.repeat(np.arange(rows.size), rows + k)
            indices = indices[np.lexsort((indices, row_of))]
            yield Draws(indptr=indptr, indices=indices.astype(np.int32), n_units=self.n_units)


def default_focal_units(design: Design, probabilities: np.ndarray, band: int) -> np.ndarray:
    """Focal units chosen from pre-treatment information only.

    The units that can never be treated (not eligible) and can be both in the
    band and pure controls. Their own assignment is always "control", so the
    conditioning of the test is automatic and the test is exact under any
    design.

    Parameters
    ----------
    design : Design
        The design: its eligible units and exposure conditions.
    probabilities : numpy.ndarray
        (n_units, n_conditions) exposure probabilities of the design.
    band : int
        Condition code of the spillover band tested.

    Returns
    -------
    numpy.ndarray
        Positions, ascending, of the units not eligible whose probabilities of
        the band and of pure control are both above 0.
    """
    pc = design.mapping.pure_control
    ok = (~design.eligible) & (probabilities[:, band] > 0) & (probabilities[:, pc] > 0)
    return np.flatnonzero(ok)


def spillover_test(
    design: Design,
    observed: np.ndarray,
    treated: np.ndarray,
    y: np.ndarray,
    probabilities: np.ndarray,
    band: int,
    *,
    focal: np.ndarray | None = None,
    n_draws: int = 2000,
    rng: RngLike = None,
    estimator: Statistic = "hajek",
    alternative: Alternative = "two-sided",
    keep_null: bool = False,
) -> RandomizationTest:
    """Exact test of the null of no spillover into a band, on focal units.

    Athey, Eckles & Imbens (2018): under the null that a focal unit's outcome
    depends only on its own assignment, the focal units' outcomes are fixed once
    their own assignments are held fixed. The test holds them fixed, redraws
    the rest of the assignment from the design conditional on them, and
    compares the focal units in the band with focal pure controls. Focal units
    are chosen from pre-treatment information only: by default the units
    that can never be treated (:func:`default_focal_units`), for which the
    conditioning is automatic; eligible focal units are supported for
    complete randomization, where the conditional design is exact.

    Parameters
    ----------
    design : Design
        The design the assignment was drawn from.
    observed : numpy.ndarray
        Observed condition code of every unit.
    treated : numpy.ndarray
        The observed assignment (fixes the eligible focal units' own
        treatment).
    y : numpy.ndarray
        Outcome per unit (e.g. incidents per unit).
    probabilities : numpy.ndarray
        (n_units, n_conditions) exposure probabilities of the design.
    band : int
        Condition code of the spillover band tested.
    focal : numpy.ndarray, optional
        Positions of the focal units (default: :func:`default_focal_units`);
        at least 10.
    n_draws : int, default 2000
        Draws of the conditional design under the null.
    rng : int, numpy.random.Generator or None
        Seed or generator of the draws (default: the design's own stream for
        this test and band).
    estimator : {"hajek", "horvitz-thompson"}, default "hajek"
        The contrast used as test statistic.
    alternative : {"two-sided", "greater", "less", "absolute"}, default "two-sided"
        Which values count as extreme (see :func:`significance`).
    keep_null : bool, default False
        Keep the statistic of every draw in the result.

    Returns
    -------
    RandomizationTest
        The observed contrast (band minus pure control among focal units), its
        p-value with Monte Carlo error, the draws and the number of focal
        units.

    Raises
    ------
    geoexp.errors.InputError
        Fewer than 10 focal units, or eligible focal units under a design other
        than complete randomization.
    """
    y = np.asarray(y, dtype=float)
    spec, focal, null = spillover_contrast(design, probabilities, band, focal)
    sampler: Sampler | FixedFocalSampler = design.sampler
    if design.eligible[focal].any():
        if not isinstance(sampler, CompleteSampler):
            raise InputError(
                "eligible focal units need the design's distribution conditional on their "
                "assignment, which geoexp draws exactly for complete randomization only; "
                "use focal units that are not eligible"
            )
        sampler = FixedFocalSampler.from_complete(sampler, focal[design.eligible[focal]], treated)
    return contrast_test(
        sampler,
        design.graph,
        design.mapping,
        y,
        observed,
        probabilities,
        spec,
        null=null,
        estimator=estimator,
        n_draws=n_draws,
        rng=design.stream(Stream.SPILLOVER_TEST, band) if rng is None else rng,
        alternative=alternative,
        n_focal=int(focal.size),
        keep_null=keep_null,
    )


def spillover_contrast(
    design: Design, probabilities: np.ndarray, band: int, focal: np.ndarray | None
) -> tuple[ContrastSpec, np.ndarray, str]:
    """The contrast of the spillover test on ``focal`` units (default
    :func:`default_focal_units`), the focal positions and the null in words.

    Raises
    ------
    geoexp.errors.InputError
        Fewer than :data:`MIN_FOCAL` focal units.
    """
    pc = design.mapping.pure_control
    focal = default_focal_units(design, probabilities, band) if focal is None else np.asarray(focal)
    if focal.size < MIN_FOCAL:
        raise InputError(
            f"only {focal.size} focal units can be both in {design.mapping.labels[band]} and pure "
            f"controls; the spillover test needs at least {MIN_FOCAL}"
        )
    mask = np.zeros(design.units.n, dtype=bool)
    mask[focal] = True
    null = f"no spillover into {design.mapping.labels[band]} (focal units)"
    return ContrastSpec(band, pc, mask), focal, null
