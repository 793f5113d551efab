"""The draw-only map: the units and the drawing tool, for exclusion zones before a design."""

from __future__ import annotations

import datetime as dt
import os
from collections.abc import Sequence

import geopandas as gpd
import numpy as np
import pandas as pd

from geoexp.errors import InputError
from geoexp.maps._geometry import district_outlines, metres_per_unit
from geoexp.maps._page import (
    DRAW_NOTE,
    Page,
    add_districts,
    add_eligible,
    finish_drawable,
    legend_row,
    line_sample,
)
from geoexp.maps._web import unit_dataset
from geoexp.maps._zones import add_zones


def drawing_map(
    units,
    *,
    eligible: Sequence[bool] | np.ndarray | pd.Index | None = None,
    districts: str | os.PathLike | gpd.GeoDataFrame | None = None,
    district_column: str | None = "district",
    description_column: str | None = "description",
    zones: Sequence[str | os.PathLike] = (),
    title: str = "Exclusion zones",
    tiles: str | None = "auto",
):
    """Map of the units with only the drawing tool, to sketch exclusion zones before a design.

    Parameters
    ----------
    units : UnitSet or GeoDataFrame
        The unit layer (projected CRS), indexed by unit id.
    eligible : bool mask or ids, optional
        Units that are eligible so far; drawn as a broad halo.
    districts : path or GeoDataFrame, optional
        District polygons (see :func:`planning_map`).
    district_column, description_column : str, optional
        Unit columns shown in tooltips.
    zones : sequence of paths
        Exclusion zones already in use, shown with the reason each carries (the
        ``reason`` property that "Save zones" writes).
    title : str
        Heading of the legend.
    tiles : str or None
        As in :func:`planning_map`.

    Returns
    -------
    folium.Map
    """
    from geoexp.cautions import CAUTION

    frame = units.frame if hasattr(units, "frame") else units
    if not isinstance(frame, gpd.GeoDataFrame) or frame.crs is None:
        raise InputError("drawing_map needs a UnitSet or a GeoDataFrame with a CRS")
    metres_per_unit(frame)  # refuses a geographic CRS early, with a clear message
    if eligible is None:
        mask = np.zeros(len(frame), dtype=bool)
    elif isinstance(eligible, pd.Index) or (
        len(eligible) and not isinstance(np.asarray(eligible).flat[0], (bool, np.bool_))
    ):
        ids = pd.Index(eligible)
        unknown = ids.difference(frame.index)
        if len(unknown):
            from geoexp.errors import describe_rows

            raise InputError(f"eligible ids not among the units: {describe_rows(unknown)}")
        mask = np.asarray(frame.index.isin(ids))
    else:
        mask = np.asarray(eligible, dtype=bool)
        if mask.shape != (len(frame),):
            raise InputError(f"eligible mask has {mask.size} entries for {len(frame)} units")

    page = Page(frame, tiles, title)
    extra = pd.DataFrame({"e": mask.astype(int)}, index=frame.index)
    page.datasets["units"] = unit_dataset(
        frame, description_column, district_column, extra, {"labels": {}, "prob_labels": []}
    )
    dist_frame, how = district_outlines(frame, district_column, districts)
    add_districts(page, dist_frame, how)
    add_zones(page, list(zones), frame.crs)
    if mask.any():
        add_eligible(page, int(mask.sum()))
    page.declare(
        "units",
        "All units",
        "units",
        True,
        len(frame),
        kind="plain",
        tip="unit",
        style={"color": "#333333", "weight": 1.5, "opacity": 0.9},
    )
    page.legend.append(legend_row(line_sample("#333333", 1.5, None), f"unit ({len(frame):,})"))
    draw_group = page.group("Drawn exclusion zones", True)
    notes = [
        f"{len(frame):,} units · {dt.date.today().isoformat()}",
        DRAW_NOTE,
    ]
    return finish_drawable(page, draw_group, notes, CAUTION)
