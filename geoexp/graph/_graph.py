"""The exposure graph itself: :class:`ExposureGraph`, its builders and the network diagnostics.

See :mod:`geoexp.graph` for the metrics and what the graph holds.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from typing import TYPE_CHECKING, Literal

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import scipy.sparse as sp
import shapely

from geoexp._engine import ENGINES, Engine
from geoexp.errors import CRSError, GeometryError, InputError, describe_rows
from geoexp.graph import _bands, _diagnostics, _euclidean, _io, _network, _noding
from geoexp.graph._diagnostics import NetworkDiagnostics
from geoexp.graph._noding import NetworkInfo

if TYPE_CHECKING:
    from geoexp.units import UnitSet


Metric = Literal["euclidean", "network"]


@dataclass(frozen=True, eq=False)
class ExposureGraph:
    """Pairs of units within ``max_distance`` metres of each other, as symmetric CSR arrays.

    Attributes
    ----------
    ids : pandas.Index
        Unit ids; position ``p`` is unit ``ids[p]``, in the order of the layer
        the graph was built from.
    indptr : numpy.ndarray
        int64 ``(n + 1,)`` row pointers.
    indices : numpy.ndarray
        int32 ``(nnz,)`` neighbour positions, ascending within each row, no
        self loops.
    distances : numpy.ndarray
        float64 ``(nnz,)`` distances in metres. Zero is a real distance
        (touching units) and is stored explicitly.
    max_distance : float
        The distance, in metres, the graph was built to.
    metric : {"euclidean", "network"}
        How distances were measured.
    crs : str or None
        The CRS of the source layer, for the record.
    network : NetworkInfo or None
        Network metric: how the street network was formed (meeting points
        found, whether lines were split where they cross or touch), for the
        record of a trial. ``None`` for the euclidean metric.
    """

    ids: pd.Index
    indptr: np.ndarray
    indices: np.ndarray
    distances: np.ndarray
    max_distance: float
    metric: Metric
    crs: str | None = None
    network: NetworkInfo | None = None

    def __post_init__(self) -> None:
        ids = self.ids if isinstance(self.ids, pd.Index) else pd.Index(self.ids)
        if not ids.is_unique:
            dup = ids[ids.duplicated()].unique()
            raise InputError(f"unit ids must be unique; repeated: {describe_rows(dup.tolist())}")
        n = len(ids)
        indptr = np.array(self.indptr, dtype=np.int64)
        indices = np.array(self.indices, dtype=np.int32)
        distances = np.array(self.distances, dtype=np.float64)
        if indptr.shape != (n + 1,) or indptr[0] != 0 or np.any(np.diff(indptr) < 0):
            raise InputError(f"indptr must be non-decreasing, start at 0 and have {n + 1} entries")
        nnz = int(indptr[-1])
        if indices.shape != (nnz,) or distances.shape != (nnz,):
            raise InputError(f"indices and distances must have indptr[-1] = {nnz} entries")
        if self.metric not in ("euclidean", "network"):
            raise InputError(f"metric must be 'euclidean' or 'network', got {self.metric!r}")
        _check_distance(self.max_distance)
        for name, arr in (("indptr", indptr), ("indices", indices), ("distances", distances)):
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)
        object.__setattr__(self, "ids", ids)
        object.__setattr__(self, "max_distance", float(self.max_distance))

    # ----------------------------------------------------------------- builders
    @classmethod
    def from_units(
        cls,
        units: UnitSet,
        max_distance: float,
        *,
        metric: Metric = "euclidean",
        snap_tolerance: float = 1.0,
        engine: Engine = "auto",
        split_at_crossings: bool = False,
        bridge_column: str | None = None,
    ) -> ExposureGraph:
        """Build the graph of a unit set.

        Parameters
        ----------
        units : geoexp.units.UnitSet
            Validated units in a projected CRS.
        max_distance : float
            Largest distance kept, in metres (> 0).
        metric : {"euclidean", "network"}
            ``"euclidean"``: distance between the geometries themselves.
            ``"network"``: shortest walk along the street network built from
            the segments (segments only).
        snap_tolerance : float
            Network metric: segment end points closer than this many metres
            are joined into one street intersection.
        engine : {"auto", "numba", "numpy"}
            Network metric: the shortest-path engine; both give identical
            results, numba is faster. Ignored by the euclidean metric.
        split_at_crossings : bool
            Network metric: also join lines where they cross or touch away
            from their end points (see :meth:`from_geometries` for why this is
            off by default).
        bridge_column : str, optional
            Network metric: column marking grade-separated segments (bridges,
            tunnels, flyovers), booleans or levels (non-zero = grade-separated),
            whose crossings are never joined.

        Returns
        -------
        ExposureGraph
            Positions follow ``units.ids``.
        """
        if metric == "network" and units.kind == "parcel":
            raise InputError(
                "the network metric needs street segments, but these units are parcels; "
                "use metric='euclidean' for parcels"
            )
        marks = None
        if bridge_column is not None:
            marks = grade_column(units.frame, bridge_column, units.source)
        return cls.from_geometries(
            units.geometry,
            max_distance,
            ids=units.ids,
            metres_per_unit=units.metres_per_unit,
            metric=metric,
            snap_tolerance=snap_tolerance,
            engine=engine,
            crs=units.crs,
            split_at_crossings=split_at_crossings,
            grade_separated=marks,
        )

    @classmethod
    def from_geometries(
        cls,
        geometry: gpd.GeoSeries | np.ndarray,
        max_distance: float,
        *,
        ids=None,
        metres_per_unit: float | None = None,
        metric: Metric = "euclidean",
        snap_tolerance: float = 1.0,
        engine: Engine = "auto",
        crs=None,
        split_at_crossings: bool = False,
        grade_separated=None,
    ) -> ExposureGraph:
        """Build the graph of bare geometries in a projected CRS.

        With the network metric, the points where lines meet are always found
        and counted (``graph.network``). By default only end points are
        junctions, as in a layer split at every junction. Lines are split
        where they cross or touch only when asked (``split_at_crossings``),
        because joining every crossing also joins streets that pass over or
        under each other (bridges, tunnels, flyovers): that gives distances
        that are too short with no sign of it, while the default's failure is
        detected and announced. When the crossings and touches away from end
        points are at least ``MANY_SHARE`` (5%) of all meeting points and the
        lines are not split, a :class:`NetworkWarning` says how many there are
        and what to do. The default also keeps graphs of trials already
        locked unchanged.

        Parameters
        ----------
        geometry : geopandas.GeoSeries or array of shapely geometries
            One geometry per unit (lines, polygons, points, or multi-parts).
        max_distance : float
            Largest distance kept, in metres (> 0).
        ids : array-like, optional
            Unit ids; defaults to the GeoSeries index (or 0..n-1).
        metres_per_unit : float, optional
            Metres per CRS length unit (0.3048006096012192 for US survey
            feet). Taken from the CRS when omitted; 1.0 when there is no CRS.
        metric, snap_tolerance, engine
            As in :meth:`from_units`.
        crs : optional
            The CRS, when ``geometry`` is a bare array.
        split_at_crossings : bool
            Network metric: add the points where lines cross or touch away
            from their end points as nodes inside the lines. A unit stays one
            line; its distance to another is the shortest walk between any
            node on one and any node on the other.
        grade_separated : array-like of bool or numbers, optional
            Network metric: one mark per unit (non-zero = bridge, tunnel or
            flyover). A crossing is joined unless either line is marked; a
            touch at a marked line's end point is still joined.

        Returns
        -------
        ExposureGraph
        """
        _check_distance(max_distance)
        if metric not in ("euclidean", "network"):
            raise InputError(f"metric must be 'euclidean' or 'network', got {metric!r}")
        if engine not in ENGINES:
            raise InputError(f"engine must be 'auto', 'numba' or 'numpy', got {engine!r}")
        if not (math.isfinite(snap_tolerance) and snap_tolerance >= 0):
            raise InputError(f"snap_tolerance must be >= 0 metres, got {snap_tolerance!r}")
        if isinstance(geometry, gpd.GeoDataFrame):
            geometry = geometry.geometry
        if isinstance(geometry, gpd.GeoSeries):
            crs = geometry.crs if crs is None else crs
            if ids is None:
                ids = geometry.index
            geoms = np.asarray(geometry.values, dtype=object)
        else:
            geoms = np.asarray(geometry, dtype=object).ravel()
        n = len(geoms)
        ids = pd.RangeIndex(n) if ids is None else pd.Index(ids)
        if len(ids) != n:
            raise InputError(f"got {len(ids)} ids for {n} geometries")
        if not ids.is_unique:
            dup = ids[ids.duplicated()].unique()
            raise InputError(f"unit ids must be unique; repeated: {describe_rows(dup.tolist())}")
        scale, crs_text = _scale(crs, metres_per_unit)
        missing = np.flatnonzero(shapely.is_missing(geoms) | shapely.is_empty(geoms))
        if missing.size:
            raise GeometryError(
                f"{missing.size} units have no geometry (missing or empty): "
                f"{describe_rows(ids[missing].tolist())}"
            )

        # Work in space-filling-curve order: neighbours sit close in memory,
        # which makes every later sparse step faster. Mapped back below.
        if n > 1:
            order = np.argsort(np.asarray(gpd.GeoSeries(geoms).hilbert_distance()), kind="stable")
        else:
            order = np.arange(n)
        inner = geoms[order]
        info = None
        if metric == "euclidean":
            first, second, dist = _euclidean.euclidean_pairs(
                inner, float(max_distance), scale, engine=engine
            )
        else:
            marks = None
            if grade_separated is not None:
                marks = _noding.grade_flags(check_marks(grade_separated, ids), n)[order]
            try:
                first, second, dist, info = _noding.noded_pairs(
                    inner,
                    float(max_distance),
                    scale,
                    float(snap_tolerance),
                    engine,
                    split_at_crossings=bool(split_at_crossings),
                    grade_separated=marks,
                )
            except _network.NotLinesError as err:
                bad = order[err.positions]
                raise InputError(
                    "the network metric needs street segments, each one connected line; "
                    f"{bad.size} units are not (points, polygons, or multi-part lines whose parts "
                    f"do not join end to end): {describe_rows(ids[np.sort(bad)].tolist())}. "
                    "Split or repair them, or use metric='euclidean'."
                ) from None
        order = order.astype(np.int32)
        pairs = [order[first], order[second], dist]
        del first, second, dist
        indptr, indices, distances = _io.pairs_to_csr(n, pairs)
        return cls(ids, indptr, indices, distances, float(max_distance), metric, crs_text, info)

    @classmethod
    def from_pairs(
        cls,
        ids,
        first,
        second,
        distance,
        *,
        max_distance: float,
        metric: Metric = "euclidean",
        crs=None,
    ) -> ExposureGraph:
        """Build the graph from undirected pairs given by position.

        Parameters
        ----------
        ids : array-like
            Unit ids, one per position.
        first, second : array-like of int
            Positions of the two units of each pair; each unordered pair at
            most once, never a unit with itself.
        distance : array-like of float
            Distance of each pair in metres, ``0 <= distance <= max_distance``.
        max_distance : float
            The distance the pairs were searched to, in metres.
        metric : {"euclidean", "network"}
            How the distances were measured.
        crs : optional
            CRS of the source layer, for the record.

        Returns
        -------
        ExposureGraph
        """
        _check_distance(max_distance)
        ids = pd.Index(ids)
        n = len(ids)
        first = np.asarray(first).ravel()
        second = np.asarray(second).ravel()
        distance = np.asarray(distance, dtype=np.float64).ravel()
        if not (first.shape == second.shape == distance.shape):
            raise InputError("first, second and distance must have the same length")
        for name, pos in (("first", first), ("second", second)):
            if pos.size and (pos.dtype.kind not in "iu" or pos.min() < 0 or pos.max() >= n):
                raise InputError(f"{name} must hold integer positions in 0..{n - 1}")
        first, second = first.astype(np.int64), second.astype(np.int64)
        rows = np.flatnonzero(first == second)
        if rows.size:
            raise InputError(f"pairs of a unit with itself at rows {describe_rows(rows.tolist())}")
        rows = np.flatnonzero(~np.isfinite(distance) | (distance < 0) | (distance > max_distance))
        if rows.size:
            raise InputError(
                f"distances must lie in [0, {max_distance}] metres; rows "
                f"{describe_rows(rows.tolist())} do not"
            )
        key = np.minimum(first, second) * n + np.maximum(first, second)
        uniq, where, count = np.unique(key, return_inverse=True, return_counts=True)
        rows = np.flatnonzero(count[where] > 1)
        if rows.size:
            raise InputError(f"pairs given more than once at rows {describe_rows(rows.tolist())}")
        indptr, indices, distances = _io.pairs_to_csr(n, [first, second, distance])
        crs_text = None if crs is None else pyproj.CRS.from_user_input(crs).to_string()
        return cls(ids, indptr, indices, distances, float(max_distance), metric, crs_text)

    # ------------------------------------------------------------- properties
    @property
    def n(self) -> int:
        """Number of units."""
        return len(self.ids)

    @property
    def n_pairs(self) -> int:
        """Number of undirected pairs."""
        return int(self.indptr[-1]) // 2

    @property
    def degree(self) -> np.ndarray:
        """Number of units within ``max_distance`` of each unit."""
        return np.diff(self.indptr)

    @property
    def matrix(self) -> sp.csr_array:
        """The ``n x n`` symmetric distance matrix (explicit zeros kept)."""
        return sp.csr_array((self.distances, self.indices, self.indptr), shape=(self.n, self.n))

    def __len__(self) -> int:
        return self.n

    def __repr__(self) -> str:
        return (
            f"ExposureGraph({self.n} units, {self.n_pairs} pairs within "
            f"{self.max_distance:g} m, metric={self.metric!r})"
        )

    # ---------------------------------------------------------------- queries
    def pairs(self) -> pd.DataFrame:
        """One row per undirected pair: ``unit_a``, ``unit_b``, ``distance_m``.

        Returns
        -------
        pandas.DataFrame
            ``unit_a`` is the unit at the lower position.
        """
        rows = np.repeat(np.arange(self.n, dtype=np.int64), self.degree)
        upper = self.indices > rows
        return pd.DataFrame(
            {
                "unit_a": self.ids[rows[upper]],
                "unit_b": self.ids[self.indices[upper]],
                "distance_m": self.distances[upper],
            }
        )

    def within(self, distance: float, *, closed: bool = True) -> ExposureGraph:
        """Keep only pairs at most ``distance`` metres apart (strictly closer if not ``closed``).

        The one way the project cuts the graph at a distance: the spillover
        reach (closed: a unit exactly at the outermost edge is in the band),
        the kept-apart gap (open: two units exactly the gap apart are allowed)
        and the neighbours of Moran's I.

        Parameters
        ----------
        distance : float
            New maximum distance in metres, ``0 < distance <= max_distance``.
        closed : bool
            Keep pairs exactly ``distance`` apart (default) or drop them.

        Returns
        -------
        ExposureGraph
        """
        _check_distance(distance)
        if distance > self.max_distance:
            raise InputError(
                f"cannot widen a graph built to {self.max_distance:g} m to {distance:g} m; "
                "build it again with the larger distance"
            )
        keep = self.distances <= distance if closed else self.distances < distance
        rows = np.repeat(np.arange(self.n, dtype=np.int64), self.degree)
        indptr = np.zeros(self.n + 1, dtype=np.int64)
        np.cumsum(np.bincount(rows[keep], minlength=self.n), out=indptr[1:])
        return ExposureGraph(
            self.ids,
            indptr,
            self.indices[keep],
            self.distances[keep],
            float(distance),
            self.metric,
            self.crs,
            self.network,
        )

    def positions(self, ids) -> np.ndarray:
        """Positions of the given unit ids.

        Parameters
        ----------
        ids : scalar or array-like
            Unit ids.

        Returns
        -------
        numpy.ndarray
            int64 positions, in the order given.
        """
        wanted = pd.Index([ids] if np.ndim(ids) == 0 else list(ids))
        pos = self.ids.get_indexer(wanted)
        missing = wanted[pos < 0]
        if len(missing):
            raise InputError(f"unknown unit ids: {describe_rows(missing.tolist())}")
        return pos.astype(np.int64)

    def nearest_distance(self, sources) -> np.ndarray:
        """Distance from each unit to the nearest source other than itself.

        Parameters
        ----------
        sources : array of int positions, or boolean mask of length n
            The source units (e.g. the treated units).

        Returns
        -------
        numpy.ndarray
            float64 ``(n,)`` in metres; ``inf`` when no source other than the
            unit itself lies within ``max_distance``. Only the sources' rows
            are read.
        """
        rows = _bands.source_positions(sources, self.n)
        return _bands.nearest_distance(self.indptr, self.indices, self.distances, rows, self.n)

    def band_members(self, sources, low: float, high: float) -> np.ndarray:
        """Positions of non-source units whose nearest source is in a distance band.

        A unit belongs to the band when its distance ``d`` to the nearest
        source satisfies ``low < d <= high``; the first band (``low == 0``)
        is closed on both sides, ``0 <= d <= high``, so touching units belong
        to it.

        Parameters
        ----------
        sources : array of int positions, or boolean mask of length n
            The source units.
        low, high : float
            Band limits in metres, ``0 <= low < high <= max_distance``.

        Returns
        -------
        numpy.ndarray
            int64 positions, ascending.
        """
        if not (math.isfinite(low) and math.isfinite(high) and 0 <= low < high):
            raise InputError(f"a band needs 0 <= low < high, got low={low!r}, high={high!r}")
        if high > self.max_distance:
            raise InputError(
                f"band upper limit {high:g} m exceeds the graph's max_distance "
                f"{self.max_distance:g} m"
            )
        rows = _bands.source_positions(sources, self.n)
        near = _bands.nearest_distance(self.indptr, self.indices, self.distances, rows, self.n)
        return np.flatnonzero(_bands.band_mask(near, rows, float(low), float(high)))

    # --------------------------------------------------------------------- io
    def save(self, path: str | os.PathLike[str]) -> None:
        """Write the graph to a ``.npz`` file (atomically; ids stored without pickle).

        Parameters
        ----------
        path : str or path-like
            Target file.
        """
        meta: dict[str, object] = {
            "max_distance": self.max_distance,
            "metric": self.metric,
            "crs": self.crs,
        }
        if self.network is not None:
            meta["network"] = self.network.to_dict()
        _io.save_npz(path, self.ids, self.indptr, self.indices, self.distances, meta)

    @classmethod
    def load(cls, path: str | os.PathLike[str]) -> ExposureGraph:
        """Read a graph written by :meth:`save`.

        Parameters
        ----------
        path : str or path-like
            A file written by :meth:`save`.

        Returns
        -------
        ExposureGraph
        """
        ids, arrays, meta = _io.load_npz(path)
        return cls(
            ids,
            arrays["indptr"],
            arrays["indices"],
            arrays["distances"],
            meta["max_distance"],
            meta["metric"],
            meta["crs"],
            NetworkInfo(**meta["network"]) if meta.get("network") else None,
        )


def network_diagnostics(
    units,
    max_distance: float,
    *,
    snap_tolerance: float = 1.0,
    split_at_crossings: bool = False,
    bridge_column: str | None = None,
    grade_separated=None,
    graph: ExposureGraph | None = None,
    metres_per_unit: float | None = None,
    engine: Engine = "auto",
) -> NetworkDiagnostics:
    """Check that the street network of a segment layer is plausible.

    Reports the connected components of the network, the units with no
    neighbour within ``max_distance`` (the outer band) along streets, the
    ratio of along-street pairs to straight-line pairs within it, and the
    points where lines meet away from their end points. ``warnings`` holds
    plain sentences, each with what to do, when

    * the along-street pairs are fewer than 25% of the straight-line pairs
      (along streets two units are never closer than in a straight line, and
      a connected street grid keeps roughly half or more of the pairs);
    * more than 10% of the units have no neighbour along streets but have one
      in a straight line;
    * more than 5% of the units lie outside the largest component;
    * lines meet away from their end points at 5% or more of their meeting
      points and the network is not split there.

    Parameters
    ----------
    units : geoexp.units.UnitSet, geopandas.GeoSeries or array of lines
        Street segments in a projected CRS (or planar coordinates).
    max_distance : float
        The outer band, metres.
    snap_tolerance, split_at_crossings, bridge_column, grade_separated
        As in :meth:`ExposureGraph.from_units` / :meth:`ExposureGraph.from_geometries`.
    graph : ExposureGraph, optional
        An along-street graph of the same units built with the same settings
        to at least ``max_distance``; reused instead of building one.
    metres_per_unit : float, optional
        For bare geometries: metres per coordinate unit.
    engine : {"auto", "numba", "numpy"}
        As in :meth:`ExposureGraph.from_units`.

    Returns
    -------
    NetworkDiagnostics
        Components, isolated units, the pair ratio, meeting points and warnings.
    """
    _check_distance(max_distance)
    if hasattr(units, "frame") and hasattr(units, "metres_per_unit"):
        if units.kind == "parcel":
            raise InputError("a street network needs street segments, but these units are parcels")
        ids = units.ids
        geoms = np.asarray(units.geometry.values, dtype=object)
        scale = float(units.metres_per_unit)
        if bridge_column is not None:
            grade_separated = grade_column(units.frame, bridge_column, units.source)
    else:
        series = units.geometry if isinstance(units, gpd.GeoDataFrame) else units
        crs = series.crs if isinstance(series, gpd.GeoSeries) else None
        ids = series.index if isinstance(series, gpd.GeoSeries) else None
        geoms = np.asarray(getattr(series, "values", series), dtype=object).ravel()
        ids = pd.RangeIndex(len(geoms)) if ids is None else pd.Index(ids)
        scale, _ = _scale(crs, metres_per_unit)
        if bridge_column is not None:
            raise InputError("bridge_column= needs a UnitSet; pass grade_separated= instead")
    marks = None
    if grade_separated is not None:
        marks = _noding.grade_flags(check_marks(grade_separated, ids), len(ids))
    reuse = None
    if graph is not None:
        if graph.metric != "network" or graph.max_distance + 1e-9 < max_distance:
            raise InputError(
                f"graph= must be an along-street graph built to at least {max_distance:g} m"
            )
        if not graph.ids.equals(ids):
            raise InputError("graph= was built over other units")
        near = graph.within(float(max_distance)) if graph.max_distance > max_distance else graph
        rows = np.repeat(np.arange(near.n, dtype=np.int64), near.degree)
        upper = near.indices > rows
        reuse = (rows[upper], near.indices[upper].astype(np.int64))
    try:
        return _diagnostics.diagnose(
            geoms,
            ids,
            float(max_distance),
            scale,
            float(snap_tolerance),
            split_at_crossings=bool(split_at_crossings),
            grade_separated=marks,
            engine=engine,
            network_pairs=reuse,
        )
    except _network.NotLinesError as err:
        raise InputError(
            "a street network needs street segments, each one connected line; "
            f"{err.positions.size} units are not: {describe_rows(ids[err.positions].tolist())}"
        ) from None


def grade_column(frame: pd.DataFrame, column: str, source: str) -> np.ndarray:
    """Marks of grade-separated units from a column of booleans or levels (non-zero = marked)."""
    if column not in frame.columns:
        present = [str(c) for c in frame.columns if c != "geometry"]
        raise InputError(
            f"'{source}' has no column {column!r} marking grade-separated segments; its columns "
            f"are {describe_rows(present, limit=len(present)) or 'none'}"
        )
    values = frame[column]
    missing = values.isna().to_numpy(dtype=bool)
    if missing.any():
        raise InputError(
            f"column {column!r} of '{source}' marks grade-separated segments but is empty for "
            f"ids {describe_rows(frame.index[missing].tolist())}; give 0/false for streets at "
            "ground level"
        )
    if values.dtype == bool:
        return values.to_numpy(dtype=bool)
    numbers = pd.to_numeric(values, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
    bad = ~np.isfinite(numbers)
    if bad.any():
        raise InputError(
            f"column {column!r} of '{source}' must hold booleans or levels (numbers; non-zero = "
            f"bridge, tunnel or flyover); ids {describe_rows(frame.index[bad].tolist())} do not"
        )
    return numbers != 0


def check_marks(values, ids: pd.Index) -> np.ndarray:
    """Grade-separation marks given as an array: one finite value per unit."""
    arr = np.asarray(values)
    if arr.shape != (len(ids),):
        raise InputError(
            f"grade_separated must hold one value per unit ({len(ids)}), got shape {arr.shape}"
        )
    if arr.dtype != bool:
        try:
            arr = arr.astype(np.float64)
        except (TypeError, ValueError):
            raise InputError("grade_separated must hold booleans or numbers (levels)") from None
        bad = ~np.isfinite(arr)
        if bad.any():
            raise InputError(
                f"grade_separated is missing for ids {describe_rows(ids[bad].tolist())}"
            )
    return arr


def _check_distance(value) -> None:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise InputError(f"a distance must be a number of metres, got {value!r}")
    if not (math.isfinite(value) and value > 0):
        raise InputError(f"a maximum distance must be a positive number of metres, got {value!r}")


def _scale(crs, metres_per_unit: float | None) -> tuple[float, str | None]:
    """Metres per CRS length unit, checked against the CRS, and the CRS as text."""
    if crs is None:
        scale = 1.0 if metres_per_unit is None else float(metres_per_unit)
        text = None
    else:
        crs = pyproj.CRS.from_user_input(crs)
        if crs.is_geographic:
            raise CRSError(
                f"distances need a projected CRS, but the layer is in {crs.name} (degrees); "
                "project it first (geoexp.units.UnitSet does this)"
            )
        from_crs = float(crs.axis_info[0].unit_conversion_factor) if crs.axis_info else 1.0
        if metres_per_unit is not None and not math.isclose(
            float(metres_per_unit), from_crs, rel_tol=1e-9
        ):
            raise CRSError(
                f"metres_per_unit={metres_per_unit} disagrees with the CRS {crs.name}, "
                f"whose unit is {from_crs} m"
            )
        scale = from_crs
        text = crs.to_string()
    if not (math.isfinite(scale) and scale > 0):
        raise InputError(f"metres_per_unit must be a positive number, got {metres_per_unit!r}")
    return scale, text
