"""Reading a trial file for the briefing pack, and planning its pages."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

from geoexp.briefing._plan import (
    ALL_UNITS,
    BriefingPlan,
    DistrictPages,
    Paper,
    page_layout,
)
from geoexp.errors import CRSError, InputError, describe_rows
from geoexp.trialfile import TrialFile


@dataclass(frozen=True)
class TrialData:
    """What the pack needs from a trial file, read once."""

    trial: TrialFile
    frame: gpd.GeoDataFrame  # every unit: condition, labels, district, street, text columns
    metres_per_unit: float
    district_column: str | None
    instructions_column: str | None
    condition_labels: dict[str, str]


def _column(units: pd.DataFrame, name: str | None, what: str, path: Path) -> str | None:
    if name and name not in units.columns:
        raise InputError(
            f"the design spec names {name!r} as the {what} column, but the unit layer of "
            f"{str(path)!r} has no such column (it has {describe_rows(list(units.columns))})"
        )
    return name or None


def load_trial(trial: TrialFile | str | Path) -> TrialData:
    tf = trial if isinstance(trial, TrialFile) else TrialFile.open(trial)
    spec = tf.spec()
    units = tf.units()
    assign = tf.assignment()
    if units.crs is None:
        raise CRSError(f"the unit layer of {str(tf.path)!r} has no CRS; a map needs one")
    # a layer declared planar (an engineering CRS) prints with grid north
    if not (units.crs.is_projected or units.crs.is_engineering):
        raise CRSError(
            f"the unit layer of {str(tf.path)!r} is in {units.crs.name}, a geographic CRS; "
            "trial files hold units in a projected CRS, so this file was not written by geoexp"
        )
    mpu_text = tf.meta.get("metres_per_unit")
    metres_per_unit = (
        float(mpu_text) if mpu_text else float(units.crs.axis_info[0].unit_conversion_factor)
    )
    district_col = _column(units, spec.field.district_column, "district", tf.path)
    description_col = _column(units, spec.field.description_column, "description", tf.path)
    instructions_col = _column(units, spec.field.instructions_column, "instructions", tf.path)
    if description_col is None and "description" in units.columns:
        description_col = "description"

    frame = gpd.GeoDataFrame(
        {
            "treated": assign["treated"].astype(bool),
            "condition": assign["condition"].astype(str),
            "condition_label": assign["condition_label"].astype(str),
        },
        geometry=units.geometry.reindex(assign.index),
        crs=units.crs,
    )
    missing = frame.index[frame.geometry.isna()]
    if len(missing):
        raise InputError(
            f"assignment rows of {str(tf.path)!r} without a unit in the unit layer: "
            f"{describe_rows(missing)}"
        )
    if district_col:
        frame["district"] = (
            units[district_col].reindex(frame.index).astype(object).fillna("(no district)")
        ).astype(str)
    else:
        frame["district"] = ALL_UNITS
    frame["description"] = (
        units[description_col].reindex(frame.index).fillna("").astype(str)
        if description_col
        else ""
    )
    if "street" in units.columns:
        frame["street"] = units["street"].reindex(frame.index).fillna("").astype(str)
    else:
        # Descriptions read "Alder St between 3rd Ave and 4th Ave": the street is the first part.
        frame["street"] = frame["description"].str.split(" between ", n=1).str[0]
    frame["instructions"] = (
        units[instructions_col].reindex(frame.index).fillna("").astype(str)
        if instructions_col
        else ""
    )
    labels = (
        frame[["condition", "condition_label"]]
        .drop_duplicates("condition")
        .set_index("condition")["condition_label"]
        .to_dict()
    )
    if not frame["treated"].any():
        raise InputError(f"trial file {str(tf.path)!r} has no treated units: nothing to brief")
    return TrialData(tf, frame, metres_per_unit, district_col, instructions_col, labels)


def label_points(geoms: gpd.GeoSeries) -> np.ndarray:
    """Points to put a unit's number on: the middle of a line, a point inside a polygon."""
    values = geoms.values
    out = shapely.point_on_surface(values)
    is_line = np.isin(shapely.get_type_id(values), (1, 5))  # LineString, MultiLineString
    if is_line.any():
        out[is_line] = shapely.line_interpolate_point(values[is_line], 0.5, normalized=True)
    return shapely.get_coordinates(out)


def plan_pages(data: TrialData, paper: str, districts: Sequence[str] | None) -> BriefingPlan:
    layout = page_layout(paper)
    frame = data.frame
    treated = frame[frame["treated"]]
    all_names = sorted(frame["district"].unique())
    with_treated = sorted(treated["district"].unique())
    if districts is not None:
        wanted = [str(d) for d in districts]
        unknown = [d for d in wanted if d not in all_names]
        if unknown:
            raise InputError(
                f"districts not found in column {data.district_column or '(none)'!r} of "
                f"{str(data.trial.path)!r}: {describe_rows(unknown)} "
                f"(known: {describe_rows(all_names)})"
            )
        chosen = [d for d in with_treated if d in set(wanted)]
        without = tuple(d for d in dict.fromkeys(wanted) if d not in set(with_treated))
    else:
        chosen = with_treated
        without = tuple(d for d in all_names if d not in set(with_treated))
    if not chosen:
        raise InputError(
            f"none of the chosen districts of {str(data.trial.path)!r} has a treated unit: "
            f"{describe_rows(without)}"
        )
    xy = label_points(treated.geometry)
    order = pd.DataFrame(
        {"district": treated["district"].to_numpy(), "y": -xy[:, 1], "x": xy[:, 0]},
        index=treated.index,
    )
    # North to south, then west to east: the order a reader scans the map.
    order = order.sort_values(["district", "y", "x"], kind="stable")
    parts = []
    number, page = 1, 3
    for name in chosen:
        ids = tuple(order.index[order["district"].to_numpy() == name])
        part = DistrictPages(
            name, ids, number, page, layout.list_pages(len(ids)), layout.log_pages(len(ids))
        )
        parts.append(part)
        number += len(ids)
        page += part.n_pages
    return BriefingPlan(layout.paper, layout, data.district_column, tuple(parts), without)


def plan_briefing(
    trial: TrialFile | str | Path,
    *,
    paper: Paper = "a4",
    districts: Sequence[str] | None = None,
) -> BriefingPlan:
    """Plan a briefing pack without drawing it: districts, numbering and page count.

    Parameters
    ----------
    trial : TrialFile or path
        A trial file with a drawn assignment.
    paper : {"a4", "letter"}
        Paper size (portrait).
    districts : sequence of str, optional
        Only these districts (values of the spec's district column); default all
        districts that hold treated units.

    Returns
    -------
    BriefingPlan
        Districts in page order, their treated units in numbering order, and
        ``n_pages``, the exact page count of :func:`briefing_pack`.
    """
    return plan_pages(load_trial(trial), paper, districts)


# ---- drawing ------------------------------------------------------------------
