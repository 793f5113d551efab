from __future__ import annotations

import datetime as dt
import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import geopandas as gpd
import pandas as pd
import pyogrio

from geoexp._atomic import atomic_path
from geoexp.errors import InputError, LockedTrialError

if TYPE_CHECKING:
    from geoexp.design import Assignment, Design, DesignSpec
    from geoexp.exposure import ExposureProbabilities

META_LAYER = "trial_meta"
FORMAT_VERSION = "1"


def _now() -> str:
    return dt.datetime.now(dt.UTC).replace(microsecond=0).isoformat()


def _write(path: Path, frame: pd.DataFrame, layer: str, append: bool = False) -> None:
    if isinstance(frame, gpd.GeoDataFrame):
        frame.to_file(path, layer=layer, driver="GPKG", engine="pyogrio", append=append)
    else:
        pyogrio.write_dataframe(frame, path, layer=layer, driver="GPKG", append=append)


def _flat(frame: pd.DataFrame, id_column: str) -> pd.DataFrame:
    out = frame.copy()
    out.index.name = id_column
    return out.reset_index()


@dataclass(frozen=True)
class TrialFile:
    """A geoexp trial GeoPackage on disk. Open it with :meth:`open`."""

    path: Path
    meta: dict[str, str]

    @classmethod
    def open(cls, path: str | Path) -> TrialFile:
        """Open an existing trial file, checking that it is one."""
        path = Path(path)
        if not path.exists():
            raise InputError(f"trial file {str(path)!r} does not exist")
        layers = cls._layers(path)
        if META_LAYER not in layers:
            raise InputError(
                f"{str(path)!r} is not a geoexp trial file (it has no {META_LAYER!r} layer; "
                f"its layers are {sorted(layers)})"
            )
        meta = pyogrio.read_dataframe(path, layer=META_LAYER)
        return cls(path, dict(zip(meta["key"], meta["value"], strict=True)))

    @staticmethod
    def _layers(path: Path) -> set[str]:
        try:
            return {str(row[0]) for row in pyogrio.list_layers(path)}
        except Exception as err:  # GDAL says little that helps a user here
            raise InputError(f"cannot read {str(path)!r} as a GeoPackage: {err}") from None

    @property
    def layers(self) -> set[str]:
        """Names of the layers in the file."""
        return self._layers(self.path)

    @property
    def is_locked(self) -> bool:
        """True once an assignment has been drawn into the file."""
        return self.meta.get("locked") == "true"

    @property
    def id_column(self) -> str:
        """Name of the unit id column."""
        return self.meta["id_column"]

    @property
    def spec_hash(self) -> str:
        """Content hash of the design spec."""
        return self.meta.get("spec_hash", "")

    def spec(self) -> DesignSpec:
        """The design spec stored in the file."""
        import tomllib

        from geoexp.design import DesignSpec

        return DesignSpec.from_dict(
            tomllib.loads(self.meta["spec_toml"]),
            base_dir=self.meta.get("spec_base_dir", str(self.path.parent)),
            source=f"{self.path} (stored spec)",
        )

    def read(self, layer: str) -> pd.DataFrame:
        """A layer indexed by unit id (if it has the id column)."""
        if layer not in self.layers:
            raise InputError(f"trial file {str(self.path)!r} has no layer {layer!r} yet")
        frame = (
            gpd.read_file(self.path, layer=layer, engine="pyogrio")
            if self._is_spatial(layer)
            else pyogrio.read_dataframe(self.path, layer=layer)
        )
        if self.id_column in frame.columns:
            frame = frame.set_index(self.id_column)
        return frame

    def _is_spatial(self, layer: str) -> bool:
        for row in pyogrio.list_layers(self.path):
            if row[0] == layer:
                return row[1] is not None
        return False

    def units(self) -> gpd.GeoDataFrame:
        """The unit layer."""
        return self.read("units")

    def assignment(self) -> gpd.GeoDataFrame:
        """The drawn assignment with conditions and probabilities."""
        return self.read("assignment")

    def write_layers(
        self, layers: dict[str, pd.DataFrame], meta: dict[str, str] | None = None
    ) -> TrialFile:
        """Write (overwrite) layers and meta keys atomically; returns the re-opened file.

        Frames indexed by unit id are written with the id as a column.
        """
        with atomic_path(self.path) as tmp:
            shutil.copy2(self.path, tmp)
            for name, frame in layers.items():
                if frame.index.name == self.id_column:
                    frame = _flat(frame, self.id_column)
                _write(tmp, frame, name)
            if meta:
                merged = {**self.meta, **meta}
                _write(
                    tmp,
                    pd.DataFrame({"key": list(merged), "value": list(merged.values())}),
                    META_LAYER,
                )
        return TrialFile.open(self.path)


def write_trial(
    path: str | Path,
    design: Design,
    assignment: Assignment,
    probabilities: ExposureProbabilities | None = None,
    *,
    replace: bool = False,
    reason: str = "",
) -> TrialFile:
    """Write a drawn design into a trial GeoPackage, atomically, and lock it.

    If the file already holds a drawn assignment, this refuses with
    :class:`LockedTrialError` unless ``replace=True``; the previous assignment
    is then appended to the ``superseded_assignments`` layer with the time it
    was replaced and ``reason``, so no drawn assignment is ever lost.
    """
    path = Path(path)
    previous: TrialFile | None = None
    superseded: pd.DataFrame | None = None
    if path.exists():
        previous = TrialFile.open(path)
        if previous.is_locked and not replace:
            raise LockedTrialError(
                f"trial file {str(path)!r} already holds an assignment drawn on "
                f"{previous.meta.get('drawn_at', '?')} with seed {previous.meta.get('seed', '?')} "
                f"(design {previous.spec_hash[:12]}). It is locked so that it cannot be redrawn "
                "silently. To draw again on purpose, ask to replace it (command line: --replace); "
                "the current assignment will be kept in the layer 'superseded_assignments'."
            )
        if previous.is_locked:
            old = pd.DataFrame(
                previous.read("assignment").drop(columns="geometry", errors="ignore")
            )
            old = old.reset_index()[[previous.id_column, "treated", "condition"]]
            old.insert(0, "draw_number", int(previous.meta.get("draw_number", "1")))
            old["spec_hash"] = previous.spec_hash
            old["seed"] = previous.meta.get("seed", "")
            old["drawn_at"] = previous.meta.get("drawn_at", "")
            old["superseded_at"] = _now()
            old["reason"] = reason
            if "superseded_assignments" in previous.layers:
                superseded = pd.concat(
                    [pyogrio.read_dataframe(path, layer="superseded_assignments"), old],
                    ignore_index=True,
                )
            else:
                superseded = old
    units, spec = design.units, design.spec
    if assignment.spec_hash != spec.hash:
        raise InputError(
            f"the assignment was drawn from design {assignment.spec_hash[:12]}, "
            f"not from this design ({spec.hash[:12]})"
        )
    id_column = units.id_column
    unit_frame = units.frame.copy()
    unit_frame["eligible"] = design.eligible
    table = assignment.to_frame()
    if probabilities is not None:
        table = table.join(probabilities.to_frame())
    assign_frame = gpd.GeoDataFrame(
        table, geometry=units.frame.geometry.reindex(table.index), crs=units.crs
    )
    draw_number = 1 + (
        int(previous.meta.get("draw_number", "0")) if previous and previous.is_locked else 0
    )
    meta = {
        "format": "geoexp trial",
        "format_version": FORMAT_VERSION,
        "name": spec.name,
        "id_column": id_column,
        "spec_toml": spec.to_toml(),
        "spec_base_dir": spec.base_dir,
        "spec_hash": spec.hash,
        "seed": str(spec.seed),
        "units_source": units.source,
        "crs_report": units.crs_report,
        "metres_per_unit": repr(units.metres_per_unit),
        "distance_unit": "metre",
        "drawn_at": assignment.drawn_at,
        "draw_number": str(draw_number),
        "n_draws": str(probabilities.n_draws if probabilities is not None else 0),
        "locked": "true",
        "created_at": previous.meta.get("created_at", _now()) if previous else _now(),
    }
    with atomic_path(path) as tmp:
        _write(tmp, _flat(unit_frame, id_column), "units")
        _write(tmp, _flat(assign_frame, id_column), "assignment")
        if probabilities is not None:
            _write(tmp, _flat(probabilities.to_frame(), id_column), "probabilities")
        if superseded is not None:
            _write(tmp, superseded, "superseded_assignments")
        _write(tmp, pd.DataFrame({"key": list(meta), "value": list(meta.values())}), META_LAYER)
    return TrialFile.open(path)


def export_assignment_csv(
    trial: TrialFile | str | Path,
    path: str | Path,
    *,
    district_column: str | None = None,
    description_column: str | None = None,
    instructions_column: str | None = None,
) -> pd.DataFrame:
    """Write the assignment as CSV for field teams: id, district, street description, condition.

    Columns that the spec names (district, description, instructions) are taken
    from the unit layer. Only eligible units are listed, treated ones first: the
    field team must know where to deliver the intervention and which eligible
    places to leave as they are.
    """
    trial = trial if isinstance(trial, TrialFile) else TrialFile.open(trial)
    spec = trial.spec()
    district_column = district_column or spec.field.district_column
    description_column = description_column or spec.field.description_column
    instructions_column = instructions_column or spec.field.instructions_column
    units = trial.units()
    assign = trial.assignment()
    out = pd.DataFrame(index=assign.index)
    for label, col in (
        ("district", district_column),
        ("description", description_column),
        ("instructions", instructions_column),
    ):
        if col:
            if col not in units.columns:
                raise InputError(
                    f"column {col!r} named in the spec is not in the unit layer of {str(trial.path)!r}"
                )
            out[label] = units[col].reindex(out.index)
    out["condition"] = assign["condition_label"]
    out["treated"] = assign["treated"].astype(bool)
    out = out[assign["eligible"].astype(bool)]
    out = out.sort_values(["treated", "condition"], ascending=[False, True], kind="stable")
    out.index.name = trial.id_column
    with atomic_path(path) as tmp:
        out.to_csv(tmp, encoding="utf-8")
    return out
