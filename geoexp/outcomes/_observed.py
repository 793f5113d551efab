"""The observed data of a trial as one value: the incidents, the two periods and how to read them."""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pyproj

from geoexp.outcomes._counts import OutcomeTable, count_incidents
from geoexp.outcomes._drops import MAX_DROPPED_SHARE, DateFormat, Period
from geoexp.outcomes._read import read_incidents
from geoexp.postgis import DatabaseSource
from geoexp.trialfile import TrialFile
from geoexp.units import UnitSet

# Snapping tolerance for street segments: a geocoded incident usually lies within a few tens of
# metres of its street's centre line (common practice).
DEFAULT_TOLERANCE_M = 30.0


@dataclass(frozen=True)
class ObservedIncidents:
    """Where a trial's incidents are, the periods they are counted in, and how to read them.

    One value carries everything the counting step needs, so the library, the
    command line and the demo pass the same bundle and no reading option can
    be lost on the way (each field is as in :func:`count_incidents`).

    Parameters
    ----------
    incidents : str, os.PathLike, pandas.DataFrame or DatabaseSource
        A CSV (with ``lon``/``lat`` or ``x``/``y`` and ``crs``), a point
        layer, a frame or a database table of incident points.
    pre, post : (start, end)
        The pre- and post-period, both days included.
    date_column : str
        Column of incident dates.
    date_format : str, optional
        How the dates are written (``"iso"``, ``"dmy"``, ``"mdy"`` or a
        strftime pattern).
    type_column : str, optional
        Column of incident types.
    by_type : bool
        Also count each incident type in its own columns.
    keep_types : sequence of str, optional
        Count only incidents of these types.
    lon, lat, x, y : str, optional
        Coordinate columns (longitude/latitude in WGS 84, or x/y in ``crs``).
    crs : object, optional
        CRS of the x/y columns.
    layer : str, optional
        Layer of a multi-layer file.
    tolerance_m : float
        Snapping tolerance in metres (default 30 m, common practice for
        street segments).
    """

    incidents: str | os.PathLike | pd.DataFrame | DatabaseSource
    pre: Period
    post: Period
    date_column: str = "date"
    date_format: DateFormat | None = None
    type_column: str | None = None
    by_type: bool = False
    keep_types: Sequence[str] | None = None
    lon: str | None = None
    lat: str | None = None
    x: str | None = None
    y: str | None = None
    crs: object = None
    layer: str | None = None
    tolerance_m: float = DEFAULT_TOLERANCE_M

    def __post_init__(self) -> None:
        if self.keep_types is not None:
            object.__setattr__(self, "keep_types", tuple(self.keep_types))

    def points(self, crs: pyproj.CRS) -> pd.DataFrame:
        """The incidents read as this bundle says, as ISO dates and x/y in ``crs``.

        Every source and date format the count step reads is read here the
        same way (:func:`count_incidents`), so later steps need no reader of
        their own. Rows with no readable date or position, and rows of types
        outside ``keep_types``, are left out.

        Parameters
        ----------
        crs : pyproj.CRS
            The CRS of the returned ``x`` and ``y`` (the units' CRS).

        Returns
        -------
        pandas.DataFrame
            Columns ``date`` (``YYYY-MM-DD`` text), ``x`` and ``y``.
        """
        rows = read_incidents(
            self.incidents,
            crs,
            date_column=self.date_column,
            type_column=self.type_column,
            x=self.x,
            y=self.y,
            lon=self.lon,
            lat=self.lat,
            crs=self.crs,
            date_format=self.date_format,
            layer=self.layer,
        )
        keep = ~np.isnat(rows.dates) & np.isfinite(rows.x) & np.isfinite(rows.y)
        if self.keep_types is not None:
            keep &= np.isin(rows.types.astype(str), list(self.keep_types))
        dates = pd.DatetimeIndex(rows.dates[keep]).strftime("%Y-%m-%d")
        return pd.DataFrame({"date": dates, "x": rows.x[keep], "y": rows.y[keep]})

    def count(
        self,
        units: UnitSet | TrialFile,
        *,
        dropped_path: str | os.PathLike | None = None,
        max_dropped_share: float | None = MAX_DROPPED_SHARE,
    ) -> OutcomeTable:
        """Count the incidents per unit and period (see :func:`count_incidents`).

        Parameters
        ----------
        units : UnitSet or TrialFile
            The units the incidents are snapped to.
        dropped_path : str or os.PathLike, optional
            Write the incidents not counted here as CSV, with a ``reason`` column.
        max_dropped_share : float or None
            Largest share of incidents that may be dropped (default 0.5).

        Returns
        -------
        OutcomeTable
            The counts per unit and period, with the drop report.
        """
        return count_incidents(
            units,
            self.incidents,
            date_column=self.date_column,
            tolerance_m=self.tolerance_m,
            pre=self.pre,
            post=self.post,
            type_column=self.type_column,
            by_type=self.by_type,
            keep_types=self.keep_types,
            x=self.x,
            y=self.y,
            lon=self.lon,
            lat=self.lat,
            crs=self.crs,
            date_format=self.date_format,
            layer=self.layer,
            dropped_path=dropped_path,
            max_dropped_share=max_dropped_share,
        )
