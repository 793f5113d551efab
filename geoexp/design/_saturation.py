"""Randomized saturation designs (Hudgens & Halloran 2008; Baird, Bohren, McIntosh & Özler 2018)."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from geoexp.design._chunked import (
    _Chunked,
    _factorize,
    _generators,
    _layer,
    _members,
    _readonly,
)
from geoexp.design._draws import Draws
from geoexp.design._kernels import sample_subsets
from geoexp.errors import DesignError, describe_rows


def _level_counts(cluster_counts: Any, n_levels: int, n_clusters: int) -> np.ndarray:
    """Counts of clusters per level from counts (sum = C) or shares (sum = 1)."""
    values = np.asarray(cluster_counts, dtype=np.float64)
    if values.shape != (n_levels,) or not np.isfinite(values).all() or (values < 0).any():
        raise DesignError(
            f"cluster_counts must give {n_levels} non-negative numbers (one per saturation "
            f"level), got {cluster_counts!r}"
        )
    if np.all(values == np.round(values)) and values.sum() == n_clusters:
        return values.astype(np.int64)
    if abs(values.sum() - 1.0) < 1e-9:
        # largest-remainder rounding of shares x C, ties to the lower level index
        exact = values * n_clusters
        counts = np.floor(exact + 1e-9).astype(np.int64)
        left = n_clusters - int(counts.sum())
        order = np.argsort(-(exact - counts), kind="stable")
        counts[order[:left]] += 1
        return counts
    raise DesignError(
        f"cluster_counts must be counts summing to the number of clusters ({n_clusters}) or "
        f"shares summing to 1; got {values.tolist()} (sum {values.sum():g})"
    )


@dataclass(frozen=True, eq=False)
class SaturationSampler(_Chunked):
    """Randomized saturation design (two-stage randomization).

    Hudgens & Halloran (2008); Baird, Bohren, McIntosh & Özler (2018). Stage
    one assigns the clusters to saturation levels by complete randomization
    of clusters to levels (``cluster_counts[l]`` clusters get level l, every
    arrangement equally likely). Stage two treats, in a cluster of n_c
    eligible units at level s, exactly ``floor(s * n_c + 0.5)`` units (round
    half up) by complete randomization within the cluster. Each draw records
    its clusters' level indices in ``Draws.extra["cluster_level"]`` (R x C,
    int8, columns in the order of ``cluster_labels``). Probabilities are those
    of this procedure, estimated by Monte Carlo. A level of 0 gives the pure
    control clusters the spillover contrast needs.

    Parameters
    ----------
    n_units : int
        Units in the full layer.
    eligible : numpy.ndarray or None
        Positions that may be treated (None: all units).
    clusters : numpy.ndarray
        Cluster label of each eligible unit.
    saturations : sequence of float
        Distinct levels in [0, 1].
    cluster_counts : sequence
        Clusters per level: counts summing to the number of clusters, or
        shares summing to 1 (then rounded to counts by largest remainder).
    """

    n_units: int
    eligible: np.ndarray | None
    clusters: np.ndarray
    saturations: Sequence[float]
    cluster_counts: Sequence[float]

    cluster_labels: np.ndarray = field(init=False, repr=False)
    cluster_codes: np.ndarray = field(init=False, repr=False)
    cluster_size: np.ndarray = field(init=False, repr=False)
    level_counts: np.ndarray = field(init=False, repr=False)
    treated_table: np.ndarray = field(init=False, repr=False)
    _members: list = field(init=False, repr=False)

    def __post_init__(self) -> None:
        n_units, eligible = _layer(self.n_units, self.eligible)
        levels = np.asarray(self.saturations, dtype=np.float64).reshape(-1)
        if levels.size == 0 or not np.isfinite(levels).all():
            raise DesignError(f"saturations must be numbers in [0, 1], got {self.saturations!r}")
        bad = levels[(levels < 0) | (levels > 1)]
        if bad.size:
            raise DesignError(
                f"saturations must lie in [0, 1] (shares of a cluster treated); got "
                f"{describe_rows(bad.tolist())}"
            )
        if np.unique(levels).size != levels.size:
            raise DesignError(f"saturations must be distinct, got {levels.tolist()}")
        if levels.size > 127:
            raise DesignError("at most 127 saturation levels are supported")
        codes, labels = _factorize(self.clusters, eligible.size, "clusters")
        sizes = np.bincount(codes, minlength=labels.size).astype(np.int64)
        counts = _level_counts(self.cluster_counts, levels.size, labels.size)
        # round half up; the tolerance makes decimal levels such as 0.15 x 10
        # behave as written despite binary floating point
        table = np.floor(np.outer(sizes, levels) + 0.5 + 1e-9).astype(np.int64)
        if counts[levels > 0].sum() == 0 or table[:, levels > 0].max(initial=0) == 0:
            raise DesignError(
                "no unit would ever be treated: every cluster gets saturation 0 or rounds to 0"
            )
        object.__setattr__(self, "n_units", n_units)
        object.__setattr__(self, "eligible", eligible)
        object.__setattr__(self, "clusters", _readonly(np.array(self.clusters)))
        object.__setattr__(self, "saturations", tuple(levels.tolist()))
        object.__setattr__(self, "cluster_counts", tuple(counts.tolist()))
        object.__setattr__(self, "cluster_labels", _readonly(labels))
        object.__setattr__(self, "cluster_codes", _readonly(codes))
        object.__setattr__(self, "cluster_size", _readonly(sizes))
        object.__setattr__(self, "level_counts", _readonly(counts))
        object.__setattr__(self, "treated_table", _readonly(table))
        object.__setattr__(self, "_members", _members(codes, labels.size))

    def _draw_chunk(self, n_draws: int, seed: np.random.SeedSequence) -> Draws:
        level_rng, main, extension = _generators(seed, 3)
        slots = np.repeat(np.arange(len(self.saturations), dtype=np.int8), self.level_counts)
        # a uniformly random arrangement of the level slots over the clusters, per draw
        levels = level_rng.permuted(np.tile(slots, (n_draws, 1)), axis=1)
        all_rows, all_pos = [], []
        for c, members in enumerate(self._members):
            m_row = self.treated_table[c][levels[:, c]]
            if m_row.max(initial=0) == 0:
                continue
            rows, values = sample_subsets(main, extension, members.size, m_row)
            all_rows.append(rows)
            all_pos.append(self.positions[members[values]])
        rows = np.concatenate(all_rows) if all_rows else np.zeros(0, np.int64)
        pos = np.concatenate(all_pos) if all_pos else np.zeros(0, np.int64)
        key = np.sort(rows * self.n_units + pos)
        rows = key // self.n_units
        indptr = np.zeros(n_draws + 1, dtype=np.int64)
        np.cumsum(np.bincount(rows, minlength=n_draws), out=indptr[1:])
        return Draws._owned(
            indptr, key - rows * self.n_units, self.n_units, {"cluster_level": levels}
        )

    def describe(self) -> str:
        """Return a plain sentence describing the procedure."""
        plan = ", ".join(
            f"{c} at {s:.0%}"
            for s, c in zip(self.saturations, self.level_counts.tolist(), strict=True)
        )
        return (
            f"Randomized saturation: {self.cluster_labels.size:,} clusters assigned to saturation "
            f"levels at random ({plan}), then within each cluster that share of its eligible "
            "units (rounded half up) treated at random."
        )
