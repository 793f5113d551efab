"""The unit set: a validated layer of trial units keyed by id, and its eligibility steps.

See :mod:`geoexp.units` for what a unit set holds and how rules are written.
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj

from geoexp.errors import InputError
from geoexp.postgis import DatabaseSource, read_source
from geoexp.units._crs import (
    Planar,
    describe_crs,
)
from geoexp.units._eligibility import exclude_mask, select_mask, subset_positions, top_positions
from geoexp.units._read import database_source, read_layer
from geoexp.units._validate import prepare

Kind = Literal["segment", "parcel"]

#: the id name of units numbered in file order (a layer with no unique id column)
ROW_ID = "row"


def numbered(frame: gpd.GeoDataFrame, source: str) -> gpd.GeoDataFrame:
    """The layer with its features numbered 0, 1, ... in file order as ids named ``"row"``.

    Parameters
    ----------
    frame : geopandas.GeoDataFrame
        The layer as read.
    source : str
        The layer's file, for the error message.

    Returns
    -------
    geopandas.GeoDataFrame
        The layer indexed by a ``RangeIndex`` named ``"row"``.
    """
    if ROW_ID in frame.columns:
        raise InputError(
            f"'{source}' already has a column {ROW_ID!r}; to number the units in file order the "
            f"id name {ROW_ID!r} must be free: rename that column, or use it as the id column"
        )
    return frame.set_axis(pd.RangeIndex(len(frame), name=ROW_ID), axis=0)


def _in_id_order(frame: gpd.GeoDataFrame, id_column: str) -> gpd.GeoDataFrame:
    # A table has no row order of its own; sorting by id keeps assignments reproducible.
    # Ids of mixed types cannot be sorted: the id checks then report them.
    if id_column not in frame.columns:
        return frame
    try:
        return frame.sort_values(id_column, kind="stable").reset_index(drop=True)
    except TypeError:
        return frame


@dataclass(frozen=True, eq=False)
class UnitSet:
    """Validated trial units keyed by their id, in a projected CRS.

    Build one with :meth:`from_file` or :meth:`from_frame`; the constructor
    itself does no checking.

    Attributes
    ----------
    frame : geopandas.GeoDataFrame
        A private copy of the layer: index = unit ids (named after the id
        column), active geometry column ``"geometry"``, projected CRS. Treat it
        as read-only.
    kind : {"segment", "parcel"}
        Street segments (lines) or parcels (polygons).
    source : str
        The file the units came from, or ``"<GeoDataFrame>"``.
    id_column : str
        Name of the id column (also ``frame.index.name``).
    crs_report : str
        One sentence: the CRS the layer had and what was done with it.
    metres_per_unit : float
        Metres per CRS unit: 1.0 for metre CRSs, 0.3048006096012192 for US
        survey feet, 0.3048 for international feet. Multiply CRS lengths by it.
    repaired : int
        Number of invalid polygons repaired with ``shapely.make_valid``.
    notes : tuple of str
        Plain-language log of validation and eligibility steps.
    """

    frame: gpd.GeoDataFrame
    kind: Kind
    source: str
    id_column: str
    crs_report: str
    metres_per_unit: float
    repaired: int = 0
    notes: tuple[str, ...] = ()

    # ------------------------------------------------------------------ build
    @classmethod
    def from_file(
        cls,
        path: str | os.PathLike | DatabaseSource,
        id_column: str | None,
        *,
        layer: str | None = None,
        crs: object = None,
        kind: Kind | None = None,
        planar: Planar | None = None,
    ) -> UnitSet:
        """Read and validate a segment or parcel layer from a file.

        Parameters
        ----------
        path : str, os.PathLike or geoexp.postgis.DatabaseSource
            GeoPackage, GeoJSON or Shapefile (read with pyogrio), or a PostGIS
            table or query: a ``postgresql://`` URL (``?table=schema.name``
            in it, or the table given as ``layer``) or a ``DatabaseSource``.
            Rows from a database are put in the order of their ids, so the
            same table gives the same assignment whatever order the server
            returns them in.
        id_column : str or None
            Column holding the unit ids (integers or text, unique, none missing).
            ``None`` numbers the units 0, 1, ... in file order, under the id
            name ``"row"`` (for a layer with no unique id column).
        layer : str, optional
            Layer name; required when the file has more than one spatial layer.
        crs : optional
            CRS of a layer that has none (anything ``pyproj.CRS.from_user_input``
            accepts). If the layer has a CRS, ``crs`` must match it.
        kind : {"segment", "parcel"}, optional
            Expected kind; an error is raised if the layer holds the other kind.
        planar : {"m", "ft", "us-ft"}, optional
            Declare a layer with no CRS to be in local planar coordinates in
            metres, international feet or US survey feet, instead of naming a
            CRS it does not have. Outputs then say "local planar coordinates
            in metres (no CRS)"; web maps and longitude/latitude inputs are
            refused for it.

        Returns
        -------
        UnitSet

        Raises
        ------
        geoexp.errors.InputError
            The file is missing or unreadable, the layer or id column does not
            exist, or ids are missing, duplicated or of mixed types.
        geoexp.errors.GeometryError
            Empty, missing, point or mixed geometries, or polygons beyond repair.
        geoexp.errors.CRSError
            No CRS and no ``crs=``, or a ``crs=`` that contradicts the file.
        """
        database = database_source(path, layer)
        if database is not None:
            if id_column is None:
                raise InputError(
                    f"{database.label}: a database table has no row order of its own, so its "
                    "rows cannot be numbered; name its id column instead"
                )
            frame = read_source(database, "units")
            return cls._build(
                _in_id_order(frame, id_column),
                id_column,
                crs=crs,
                source=database.label,
                label=database.label,
                kind=kind,
                from_file=False,
                planar=planar,
            )
        # database_source() returns a DatabaseSource for every database path
        assert not isinstance(path, DatabaseSource)
        text = os.fspath(path)
        frame = read_layer(text, layer, "units")
        label = text if layer is None else f"{text} (layer {layer})"
        if id_column is None:
            frame = numbered(frame, label)
        return cls._build(
            frame,
            id_column,
            crs=crs,
            source=text,
            label=label,
            kind=kind,
            from_file=True,
            planar=planar,
        )

    @classmethod
    def from_frame(
        cls,
        frame: gpd.GeoDataFrame,
        id_column: str | None = None,
        *,
        crs: object = None,
        source: str = "<GeoDataFrame>",
        kind: Kind | None = None,
        planar: Planar | None = None,
    ) -> UnitSet:
        """Validate a GeoDataFrame of segments or parcels; the caller's frame is not changed.

        Parameters
        ----------
        frame : geopandas.GeoDataFrame
            Lines (street segments) or polygons (parcels).
        id_column : str, optional
            Column holding the unit ids; ``None`` uses the frame's index.
        crs : optional
            CRS for a frame that has none; must match the frame's CRS otherwise.
        source : str
            Name used in messages and kept in :attr:`source`.
        kind : {"segment", "parcel"}, optional
            Expected kind of unit.
        planar : {"m", "ft", "us-ft"}, optional
            Declare a frame with no CRS to be in local planar coordinates
            (see :meth:`from_file`).

        Returns
        -------
        UnitSet
        """
        return cls._build(
            frame,
            id_column,
            crs=crs,
            source=source,
            label=source,
            kind=kind,
            from_file=False,
            planar=planar,
        )

    @classmethod
    def _build(
        cls, frame, id_column, *, crs, source, label, kind, from_file, planar=None
    ) -> UnitSet:
        # ``label`` names the file and layer in messages; ``source`` is kept on the object.
        ready = prepare(
            frame,
            id_column,
            crs=crs,
            source=label,
            kind=kind,
            from_file=from_file,
            planar=planar,
        )
        return cls(
            frame=ready.frame,
            kind=ready.kind,
            source=source,
            id_column=str(ready.frame.index.name),
            crs_report=ready.crs_report,
            metres_per_unit=ready.metres_per_unit,
            repaired=ready.repaired,
            notes=ready.notes,
        )

    # ------------------------------------------------------------- properties
    @property
    def ids(self) -> pd.Index:
        """Unit ids, in the order of the units."""
        return self.frame.index

    @property
    def geometry(self) -> gpd.GeoSeries:
        """Unit geometries indexed by id, in the units' projected CRS."""
        return self.frame.geometry

    @property
    def crs(self) -> pyproj.CRS:
        """The units' projected CRS, or the local engineering CRS of planar coordinates."""
        return pyproj.CRS(self.frame.crs)

    @property
    def is_planar(self) -> bool:
        """True when the units are in local planar coordinates (no geographic reference)."""
        return self.crs.is_engineering

    @property
    def crs_label(self) -> str:
        """The CRS as outputs should name it (name and code, or "local planar coordinates ...")."""
        return describe_crs(self.crs)

    @property
    def n(self) -> int:
        """Number of units."""
        return len(self.frame)

    def __len__(self) -> int:
        return len(self.frame)

    def __repr__(self) -> str:
        return (
            f"UnitSet({self.n:,} {self.kind}s from {self.source!r}, id {self.id_column!r}, "
            f"{self.crs.name})"
        )

    # ------------------------------------------------------------ eligibility
    def _keep(self, positions: np.ndarray, rule: str, extra: Sequence[str] = ()) -> UnitSet:
        if len(positions) == 0:
            raise InputError(f"no units of '{self.source}' would be left ({rule})")
        note = f"kept {len(positions):,} of {self.n:,} units: {rule}"
        return dataclasses.replace(
            self, frame=self.frame.iloc[positions].copy(), notes=(*self.notes, *extra, note)
        )

    def select(self, where: str | pd.Series | np.ndarray) -> UnitSet:
        """Keep the units satisfying an attribute rule.

        Parameters
        ----------
        where : str, pandas.Series or numpy.ndarray
            A rule over the unit attributes and the id in geoexp's own rule
            language (see :func:`parse_rule`; e.g. ``"land_use == 'retail' and
            incidents_y1 > 0"``; missing values compare false), or a boolean
            mask: a Series indexed by the ids or an array in unit order.

        Returns
        -------
        UnitSet
            The kept units, in their original order, with a note.
        """
        mask, rule = select_mask(self.frame, where, self.source)
        return self._keep(np.flatnonzero(mask), rule)

    def top(self, column: str, *, k: int | None = None, share: float | None = None) -> UnitSet:
        """Keep the hot spots: the ``k`` units (or the ``share`` of units) with the largest counts.

        Ties at the cut-off are broken by ascending unit id, so exactly ``k``
        units are kept; the note says how many units were tied at the cut-off
        value and how many of them were kept. ``share`` keeps
        ``ceil(share * n)`` units.

        Parameters
        ----------
        column : str
            Numeric column to rank by (e.g. last year's incident count).
        k : int, optional
            Number of units to keep, 1 <= k <= n.
        share : float, optional
            Fraction of units to keep, in (0, 1]. Give exactly one of k, share.

        Returns
        -------
        UnitSet
            The kept units, in their original (layer) order.
        """
        positions, rule, extra = top_positions(self.frame, column, k, share, self.source)
        return self._keep(positions, rule, extra)

    def exclude(
        self,
        zones: str | os.PathLike | gpd.GeoDataFrame | gpd.GeoSeries,
        *,
        layer: str | None = None,
        how: Literal["intersects", "within"] = "intersects",
    ) -> UnitSet:
        """Drop the units in exclusion zones (a stadium, an area under another programme).

        Parameters
        ----------
        zones : path, GeoDataFrame or GeoSeries
            Polygons, from a GeoJSON, GeoPackage or Shapefile or in memory. They
            must carry a CRS; zones in another CRS (EPSG:4326 for zones drawn
            on a web map) are reprojected to the units' CRS, with a note.
        layer : str, optional
            Layer of a multi-layer zones file.
        how : {"intersects", "within"}
            ``"intersects"`` drops a unit if any part of it is in a zone;
            ``"within"`` only if it lies wholly inside the zones.

        Returns
        -------
        UnitSet
            The remaining units, in their original order.
        """
        keep, rule, extra = exclude_mask(self.frame, zones, layer, how)
        return self._keep(np.flatnonzero(keep), rule, extra)

    def subset(self, ids) -> UnitSet:
        """Keep the units with these ids, in the order given.

        Parameters
        ----------
        ids : list-like
            Unit ids; unknown or repeated ids raise InputError.

        Returns
        -------
        UnitSet
        """
        positions = subset_positions(self.frame, ids)
        return self._keep(positions, f"{len(positions):,} ids chosen by subset()")
