"""From a spec to the things it names: its units, its eligible units and its sampler.

:class:`~geoexp.design.DesignSpec` is a pure value; reading files and applying
rules happens here. Samplers are built by one function per assignment method,
registered in :data:`SAMPLER_BUILDERS` under the method's name; the options
every method shares (kept apart, rerandomization, a floor on pure controls)
are applied around them in :func:`build_sampler`.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pandas as pd

from geoexp.design._floor import PureControlFloor
from geoexp.design._protocol import Sampler
from geoexp.design._samplers import (
    BlockedSampler,
    CompleteSampler,
    Rerandomized,
    SaturationSampler,
    SeparatedSampler,
)
from geoexp.design._spec import DesignSpec
from geoexp.errors import DesignError, describe_rows
from geoexp.postgis import DatabaseSource, is_database_url
from geoexp.units import UnitSet

__all__ = ["SAMPLER_BUILDERS", "SamplerInputs", "build_sampler", "eligible_for", "units_for"]


def units_for(spec: DesignSpec) -> UnitSet:
    """Read the unit layer named by ``spec`` (``[units]``), relative to the spec's folder.

    A ``postgresql://`` path reads the table named by ``layer`` or the rows of ``query``.

    Parameters
    ----------
    spec : DesignSpec
        The design spec; its ``[units]`` table gives the path (or database URL),
        layer or query, id column and CRS.

    Returns
    -------
    UnitSet
        Every unit of the layer (eligibility rules not yet applied).
    """
    u = spec.units
    id_column = None if u.number_rows else u.id_column
    if is_database_url(u.path):
        source = DatabaseSource.parse(u.path, table=u.layer, query=u.query)
        return UnitSet.from_file(source, id_column, crs=u.crs, planar=u.planar)
    return UnitSet.from_file(
        spec.resolve(u.path), id_column, layer=u.layer, crs=u.crs, planar=u.planar
    )


def eligible_for(spec: DesignSpec, units: UnitSet) -> UnitSet:
    """Apply the ``[eligible]`` rules to ``units``: the rule, exclusion zones, then hot spots.

    Exclusion zones come before the top-k/top-share cut, so that hot spots
    are picked among the places that may be treated at all.

    Parameters
    ----------
    spec : DesignSpec
        The design spec; its ``[eligible]`` table gives the rules.
    units : UnitSet
        The units read by :func:`units_for`.

    Returns
    -------
    UnitSet
        The units kept by every rule, in their original order (``units`` is
        not changed).
    """
    e = spec.eligible
    out = units
    if e.where:
        out = out.select(e.where)
    for zone in e.exclude:
        out = out.exclude(spec.resolve(zone), how=e.exclude_how)
    if e.top_column:
        out = out.top(e.top_column, k=e.top_k, share=e.top_share)
    return out


@dataclass(frozen=True)
class SamplerInputs:
    """What a sampler builder gets: the spec, the units, the eligible mask and the graph."""

    spec: DesignSpec
    units: UnitSet
    eligible: np.ndarray
    graph: object
    mapping: object

    @property
    def positions(self) -> np.ndarray:
        """Positions of the eligible units."""
        return np.flatnonzero(self.eligible)


def _labels(units: UnitSet, column: str, eligible: np.ndarray, what: str) -> np.ndarray:
    columns = [c for c in units.frame.columns if c != "geometry"]
    if column not in columns:
        raise DesignError(
            f"{what} column {column!r} is not in {units.source!r}; its columns are {columns}"
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
    # the spec holds exactly one of quotas, a count or a share per block
    assert a.block_share is not None
    # round half up, so a share of 0.5 of 3 units treats 2 (stated in the check report)
    return dict(zip(labels, _round_half_up(a.block_share * sizes).tolist(), strict=True))


def _gap_csr(graph, gap: float) -> tuple[np.ndarray, np.ndarray]:
    """CSR of the pairs strictly closer than ``gap`` (a pair exactly at the gap is allowed)."""
    keep = graph.distances < gap
    rows = np.repeat(np.arange(graph.n), np.diff(graph.indptr))
    counts = np.bincount(rows[keep], minlength=graph.n)
    indptr = np.concatenate(([0], np.cumsum(counts))).astype(np.int64)
    return indptr, graph.indices[keep]


def _separated(
    inputs: SamplerInputs, m: int | None, blocks: np.ndarray | None, quotas: dict | None
) -> SeparatedSampler:
    gap = inputs.spec.assignment.gap_m
    assert gap is not None  # only designs with a gap are kept apart
    gap_indptr, gap_indices = _gap_csr(inputs.graph, gap)
    return SeparatedSampler(
        inputs.units.n,
        inputs.positions,
        n_treated=m,
        gap_graph=(gap_indptr, gap_indices),
        blocks=blocks,
        quotas=quotas,
        gap=gap,
    )


def _complete(inputs: SamplerInputs) -> Sampler:
    """Complete randomization (kept apart when ``gap_m`` is given)."""
    a = inputs.spec.assignment
    n_e = int(inputs.eligible.sum())
    if a.treated is not None:
        m = int(a.treated)
    else:
        assert a.share is not None  # the spec holds exactly one of treated and share
        m = int(_round_half_up(a.share * n_e))
    if a.gap_m is not None:
        return _separated(inputs, m, None, None)
    return CompleteSampler(inputs.units.n, inputs.positions, m)


def _blocked(inputs: SamplerInputs) -> Sampler:
    """Blocked randomization with a fixed number per block (kept apart when ``gap_m`` is given)."""
    a = inputs.spec.assignment
    assert a.block_column is not None  # the spec requires it of a blocked design
    blocks = _labels(inputs.units, a.block_column, inputs.eligible, "block")
    quotas = _quotas(inputs.spec, blocks)
    if a.gap_m is not None:
        return _separated(inputs, None, blocks, quotas)
    return BlockedSampler(inputs.units.n, inputs.positions, blocks, quotas)


def _saturation(inputs: SamplerInputs) -> Sampler:
    """Randomized saturation over clusters (Baird, Bohren, McIntosh & Özler 2018)."""
    a = inputs.spec.assignment
    assert a.cluster_column is not None  # the spec requires it of a saturation design
    clusters = _labels(inputs.units, a.cluster_column, inputs.eligible, "cluster")
    return SaturationSampler(
        inputs.units.n,
        inputs.positions,
        clusters,
        tuple(a.saturations),
        tuple(a.cluster_counts),
    )


#: one builder per ``[assignment] method``
SAMPLER_BUILDERS: dict[str, Callable[[SamplerInputs], Sampler]] = {
    "complete": _complete,
    "blocked": _blocked,
    "saturation": _saturation,
}


def _covariates(units: UnitSet, columns: list[str], eligible: np.ndarray) -> np.ndarray:
    present = [c for c in units.frame.columns if c != "geometry"]
    missing = [c for c in columns if c not in present]
    if missing:
        raise DesignError(
            f"[rerandomize] covariates {missing} are not columns of {units.source!r}; "
            f"its columns are {present}"
        )
    for column in columns:
        series = units.frame[column]
        if pd.api.types.is_bool_dtype(series.dtype) or not pd.api.types.is_numeric_dtype(
            series.dtype
        ):
            raise DesignError(
                f"[rerandomize] covariate {column!r} of {units.source!r} must hold numbers to "
                f"balance on; it holds {series.dtype} values such as "
                f"{describe_rows(series.dropna().unique()[:3].tolist())}"
            )
        values = series.to_numpy(dtype=float, na_value=np.nan)[eligible]
        bad = ~np.isfinite(values)
        if bad.any():
            raise DesignError(
                f"[rerandomize] covariate {column!r} of {units.source!r} is missing or not "
                f"finite for {int(bad.sum())} eligible units: ids "
                f"{describe_rows(units.ids[eligible][bad])}"
            )
    return units.frame[columns].to_numpy(dtype=float)[eligible]


def build_sampler(spec: DesignSpec, units: UnitSet, eligible: np.ndarray, graph, mapping):
    """The sampler a spec describes: its method's builder, then rerandomization and the floor.

    Parameters
    ----------
    spec : DesignSpec
        The design spec (a pure value).
    units : UnitSet
        The units the spec resolves to (:func:`units_for`).
    eligible : numpy.ndarray
        Boolean mask over the units.
    graph : ExposureGraph
        Wide enough for the bands and the gap.
    mapping : ExposureMapping
        The exposure conditions (treated, spillover bands, pure control).

    Returns
    -------
    Sampler
    """
    inputs = SamplerInputs(spec, units, eligible, graph, mapping)
    sampler = SAMPLER_BUILDERS[spec.assignment.method](inputs)
    if spec.rerandomize is not None:
        cols = list(spec.rerandomize.covariates)
        x = _covariates(units, cols, eligible)
        sampler = Rerandomized(sampler, x, spec.rerandomize.acceptance, covariate_names=tuple(cols))
    if spec.assignment.min_pure_controls:
        sampler = PureControlFloor(
            sampler, graph, mapping, eligible, int(spec.assignment.min_pure_controls)
        )
    return sampler
