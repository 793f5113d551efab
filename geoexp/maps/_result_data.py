"""The data every result map shows: units, observed change, conditions and estimates."""

from __future__ import annotations

import os
from dataclasses import dataclass
from typing import TYPE_CHECKING

import geopandas as gpd
import numpy as np
import pandas as pd

from geoexp.errors import GeometryError, InputError, describe_rows
from geoexp.maps._geometry import band_rings, metres_per_unit
from geoexp.maps._page import NEVER_COLOUR
from geoexp.maps._palette import condition_order

if TYPE_CHECKING:
    from geoexp.analysis import Analysis, Verdict
    from geoexp.estimate import ContrastEstimate
    from geoexp.trialfile import TrialFile

# Diverging colours for the change: ColorBrewer's RdBu (Harrower & Brewer,
# 2003), reversed so that fewer incidents are blue and more are red. It is
# one of their colour-blind-safe diverging schemes; the pale middle is "no
# change", which is why every line gets a dark casing.
CHANGE_CMAP = "RdBu_r"
# Where the colour scale saturates: this quantile of |change|, so that a few
# extreme units do not wash out everything else.
SATURATION_QUANTILE = 0.95
CASING_COLOUR = "#3a3a3a"
TREATED_CASING = "#000000"
RING_FILL_OPACITY = 0.16
MAP_BACKGROUND = "#f3f1ec"
LEGEND_WIDTH_PX = 360


def contrast_codes(analysis: Analysis) -> tuple[str, ...]:
    """The condition code of each contrast's exposed condition, in the order of the effects.

    Each contrast row of the analysis carries its condition codes
    (:attr:`geoexp.analysis.ContrastResult.exposure_code`); outputs match
    effects to conditions by these codes, never by label text or column order.
    """
    codes = analysis.codes
    if len(codes) != len(analysis.effects):
        raise InputError(
            f"the analysis has {len(analysis.effects)} contrasts but only {len(codes)} contrast "
            "rows carrying their condition codes; it cannot be mapped"
        )
    return codes


@dataclass(frozen=True, eq=False)
class ResultData:
    """Units with geometry and results, in the analysis' unit order."""

    units: gpd.GeoDataFrame  # geometry + description/district columns, indexed by unit id
    per_unit: pd.DataFrame  # analysis.per_unit
    codes: tuple[str, ...]  # condition codes present, map order
    labels: dict[str, str]  # code -> label
    counts: dict[str, int]  # code -> number of units
    bands: tuple[float, ...]  # outer band distances, metres
    rows: tuple[tuple[str, ContrastEstimate, Verdict], ...]  # (code, ContrastEstimate, Verdict)
    description_column: str | None
    district_column: str | None
    title: str
    subtitle: str
    metres_per_unit: float

    @property
    def change(self) -> np.ndarray:
        return self.per_unit["change"].to_numpy(dtype=float)

    @property
    def polygonal(self) -> bool:
        """True for parcels (polygons), False for street segments (lines)."""
        import shapely

        kinds = shapely.get_type_id(np.asarray(self.units.geometry.array, dtype=object))
        return bool(len(kinds)) and bool(np.isin(kinds, (3, 6)).all())


def gather(analysis: Analysis, trial: TrialFile | str | os.PathLike) -> ResultData:
    from geoexp.trialfile import TrialFile

    tf = trial if isinstance(trial, TrialFile) else TrialFile.open(trial)
    where = f"trial file {str(tf.path)!r}"
    if tf.spec_hash and analysis.spec_hash and tf.spec_hash != analysis.spec_hash:
        raise InputError(
            f"the analysis is of design {analysis.spec_hash[:12]} but {where} holds design "
            f"{tf.spec_hash[:12]}; map an analysis with the trial file it was made from"
        )
    per_unit = analysis.per_unit
    needed = {"condition", "condition_label", "pre", "post", "change", "treated", "eligible"}
    missing_cols = sorted(needed - set(per_unit.columns))
    if missing_cols:
        raise InputError(f"the analysis' per-unit table lacks the columns {missing_cols}")
    units = tf.units()
    absent = per_unit.index.difference(units.index)
    if len(absent):
        raise InputError(
            f"{where}: {len(absent)} units of the analysis are not in its 'units' layer: "
            f"ids {describe_rows(absent)}"
        )
    units = units.loc[per_unit.index]
    empty = units.geometry.isna() | units.geometry.is_empty
    if empty.any():
        raise GeometryError(
            f"{where}, layer 'units', column {units.geometry.name!r}: {int(empty.sum())} units "
            f"have no geometry and cannot be mapped: ids {describe_rows(units.index[empty])}"
        )
    spec = tf.spec()
    codes = tuple(condition_order(per_unit["condition"].astype(str).unique()))
    labels = (
        per_unit.drop_duplicates("condition")
        .set_index("condition")["condition_label"]
        .astype(str)
        .to_dict()
    )
    counts = per_unit["condition"].value_counts()
    rows = tuple(zip(contrast_codes(analysis), analysis.effects, analysis.verdicts, strict=True))
    bands = tuple(float(b) for b in (analysis.band_edges or spec.exposure.bands_m))
    level = int(round(100 * analysis.level))
    subtitle = (
        f"design {analysis.spec_hash[:12]} · outcome: {analysis.outcome_words} · "
        f"{analysis.estimator} estimates vs pure control with {level}% intervals"
    )
    return ResultData(
        units=units,
        per_unit=per_unit,
        codes=codes,
        labels=labels,
        counts={c: int(counts.get(c, 0)) for c in codes},
        bands=bands,
        rows=rows,
        description_column=spec.field.description_column,
        district_column=spec.field.district_column,
        title=str(tf.meta.get("name") or analysis.name),
        subtitle=subtitle,
        metres_per_unit=metres_per_unit(units),
    )


def change_limit(change: np.ndarray) -> float:
    """Where the change colour scale saturates: a whole number, at least 1.

    The 95th percentile of the absolute change, rounded up, so that units
    beyond it take the end colours and the scale says "or more".

    Parameters
    ----------
    change : numpy.ndarray
        Change in incidents per unit (after minus before); NaN where a unit has
        no value, ignored.

    Returns
    -------
    float
        The limit in incidents per unit; 1.0 when no value is finite.
    """
    finite = np.abs(change[np.isfinite(change)])
    if finite.size == 0:
        return 1.0
    return float(max(1.0, np.ceil(np.quantile(finite, SATURATION_QUANTILE))))


def change_colours(change: np.ndarray, limit: float) -> np.ndarray:
    """Hex colour per unit; units with no change value get the grey of "never"."""
    from matplotlib import colormaps

    rgba = colormaps[CHANGE_CMAP]((np.clip(change, -limit, limit) + limit) / (2 * limit))
    rgb = np.round(rgba[:, :3] * 255).astype(np.int64)
    hexes = np.char.add("#", np.char.zfill(np.char.mod("%06x", rgb @ [65536, 256, 1]), 6))
    return np.where(np.isfinite(change), hexes, NEVER_COLOUR).astype(object)


def effect_words(effect, verdict=None) -> str:
    """Estimate with the interval printed beside its verdict (test inversion), else the
    normal approximation."""
    low, high = effect.ci_low, effect.ci_high
    if verdict is not None and np.isfinite([verdict.ci_low, verdict.ci_high]).any():
        low, high = verdict.ci_low, verdict.ci_high
    return f"{effect.estimate:+.2f} ({low:+.2f} to {high:+.2f})"


def treated_rings(data: ResultData) -> np.ndarray | None:
    treated = data.units.geometry[data.per_unit["treated"].astype(bool).to_numpy()]
    if len(treated) == 0 or not data.bands:
        return None
    return band_rings(treated, data.bands)
