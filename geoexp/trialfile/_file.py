from __future__ import annotations

import contextlib
import contextvars
import datetime as dt
import json
import os
import shutil
import sqlite3
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pyogrio.errors

from geoexp._atomic import atomic_path
from geoexp.errors import GeoexpError, InputError, LockedTrialError, TrialWriteError
from geoexp.trialfile._lock import Notify, trial_lock

if TYPE_CHECKING:
    from geoexp.design import Assignment, Design, DesignSpec
    from geoexp.exposure import ExposureProbabilities

META_LAYER = "trial_meta"
FORMAT_VERSION = "1"
OUTCOMES_LAYER = "outcomes"
RESULTS_LAYER = "results"
UNIT_DIGESTS_LAYER = "unit_fingerprints"
SUPERSEDED_ASSIGNMENTS = "superseded_assignments"
SUPERSEDED_OUTCOMES = "superseded_outcomes"
SUPERSEDED_RESULTS = "superseded_results"
SUPERSEDED_META = "superseded_meta"


# Layers read inside shared_reads(): (path, layer, inode, size, mtime) -> frame
_SHARED_READS: contextvars.ContextVar[dict | None] = contextvars.ContextVar(
    "geoexp_shared_trial_reads", default=None
)


@contextlib.contextmanager
def shared_reads() -> Iterator[None]:
    """Inside, each layer of a trial file is read from disk once while the file is unchanged.

    For work that reads the same large layer in several places (a report reads
    the units for its map and for its unit flow). A write replaces the file,
    so a later read sees the new layer. The frames are released on exit.
    """
    token = _SHARED_READS.set({})
    try:
        yield
    finally:
        _SHARED_READS.reset(token)


def _now() -> str:
    return dt.datetime.now(dt.UTC).replace(microsecond=0).isoformat()


def _arrow_safe(frame: pd.DataFrame) -> bool:
    """True when writing through Arrow stores exactly what the row-by-row writer stores.

    That holds for numbers, booleans, text and the geometry with a plain row index
    (checked by reading both back); any other column (object, dates, categories)
    keeps the row-by-row writer, whose conversions the trial files were made with.
    """
    if not (isinstance(frame.index, pd.RangeIndex) and frame.index.name is None):
        return False
    for dtype in frame.dtypes:
        if isinstance(dtype, gpd.array.GeometryDtype | pd.StringDtype):
            continue
        if not (isinstance(dtype, np.dtype) and dtype.kind in "iufb"):
            return False
    return True


def _write(path: Path, frame: pd.DataFrame, layer: str, append: bool = False) -> None:
    if not append and _arrow_safe(frame):
        # Arrow hands the columns over whole: at a million units it halves a layer's write
        # (text columns most of all)
        pyogrio.write_dataframe(frame, path, layer=layer, driver="GPKG", use_arrow=True)
    elif isinstance(frame, gpd.GeoDataFrame):
        frame.to_file(path, layer=layer, driver="GPKG", engine="pyogrio", append=append)
    else:
        pyogrio.write_dataframe(frame, path, layer=layer, driver="GPKG", append=append)


def _flat(frame: pd.DataFrame, id_column: str) -> pd.DataFrame:
    out = frame.copy()
    out.index.name = id_column
    return out.reset_index()


def _meta_frame(meta: dict[str, str]) -> pd.DataFrame:
    return pd.DataFrame({"key": list(meta), "value": [str(v) for v in meta.values()]})


def _drop_attribute_tables(path: Path, names: list[str]) -> None:
    """Remove non-spatial layers from a GeoPackage (GDAL's Python bindings are not needed)."""
    if not names:
        return
    con = sqlite3.connect(path)
    try:
        with con:
            tables = {
                r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type='table'")
            }
            for name in names:
                kind = con.execute(
                    "SELECT data_type FROM gpkg_contents WHERE table_name = ?", (name,)
                ).fetchone()
                if kind is None:
                    continue
                if kind[0] != "attributes":  # spatial layers are overwritten, never dropped
                    raise ValueError(f"layer {name!r} is spatial")
                con.execute(f'DROP TABLE IF EXISTS "{name}"')
                for registry in (
                    "gpkg_contents",
                    "gpkg_ogr_contents",
                    "gpkg_extensions",
                    "gpkg_data_columns",
                ):
                    if registry in tables:
                        con.execute(f"DELETE FROM {registry} WHERE table_name = ?", (name,))
    finally:
        con.close()


@contextlib.contextmanager
def _failures_named(path: Path) -> Iterator[None]:
    """Turn a failed write (no space left, permissions, GDAL errors) into one clear error."""
    try:
        yield
    except GeoexpError:
        raise
    except (OSError, sqlite3.Error, pyogrio.errors.DataSourceError, pyogrio.errors.DataLayerError,
            pyogrio.errors.FieldError, pyogrio.errors.FeatureError) as err:  # fmt: skip
        raise TrialWriteError(
            f"could not write trial file {str(path)!r}: {err}. The file was left as it was "
            "before this command (every write goes to a temporary copy that replaces the file "
            "only once it is complete)."
        ) from err


@dataclass(frozen=True)
class _Change:
    """What one locked write does to a trial file (built from the file as read under the lock)."""

    layers: dict[str, pd.DataFrame] = field(default_factory=dict)
    meta: dict[str, str] | None = None  # the whole new meta; None keeps it
    drop: tuple[str, ...] = ()
    # called with the written temporary file; returns meta keys to add (e.g. digests of layers
    # as read back, so that later checks compare like with like)
    after: Callable[[Path, TrialFile], dict[str, str]] | None = None


@dataclass(frozen=True)
class TrialFile:
    """A geoexp trial GeoPackage on disk. Open it with :meth:`open`.

    A ``TrialFile`` is a snapshot: its ``meta`` is what the file held when it
    was opened. Every write re-reads the file under the trial's lock, so
    writing through an old snapshot never undoes another command's write.
    """

    path: Path
    meta: dict[str, str]

    @classmethod
    def open(cls, path: str | os.PathLike[str]) -> TrialFile:
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
            if path.suffix.lower() == ".toml":
                raise InputError(
                    f"{str(path)!r} is a design spec, not a trial file (a GeoPackage written when "
                    "the design's assignment is drawn): draw it first with 'geoexp draw "
                    f"{path.name} --trial trial.gpkg', and give the trial file here; to map a "
                    "spec before any design is drawn, use 'geoexp map --draw-only'"
                ) from None
            reason = str(err).split(";")[0].strip().rstrip(".")
            raise InputError(
                f"cannot read {str(path)!r} as a trial file: it is not a GeoPackage ({reason})"
            ) from None

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

    @property
    def design_fingerprint(self) -> str:
        """The recorded design fingerprint (64 hex digits; '' for files written before them)."""
        return self.meta.get("design_fingerprint", "")

    @property
    def network(self) -> dict | None:
        """How the street network was formed (``NetworkInfo.to_dict()``), None for straight lines."""
        text = self.meta.get("network", "")
        return json.loads(text) if text else None

    @property
    def coordinates(self) -> str:
        """The units' CRS as outputs name it, or "local planar coordinates in metres (no CRS)"."""
        return self.meta.get("coordinates", "")

    @property
    def draw_number(self) -> int:
        """1 for the first assignment drawn into the file, 2 after one replacement, ..."""
        return int(self.meta.get("draw_number", "0") or 0)

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
        """A layer indexed by unit id (if it has the id column).

        Inside :func:`shared_reads`, a layer of an unchanged file is read from
        disk once and handed out again (as a copy) to later reads.
        """
        if layer not in self.layers:
            raise InputError(f"trial file {str(self.path)!r} has no layer {layer!r} yet")
        shared = _SHARED_READS.get()
        key = None
        if shared is not None:
            stat = self.path.stat()
            key = (str(self.path.resolve()), layer, stat.st_ino, stat.st_size, stat.st_mtime_ns)
            if key in shared:
                # pandas copies on write: the caller may change its copy, never the shared one
                return shared[key].copy(deep=False)
        frame = (
            gpd.read_file(self.path, layer=layer, engine="pyogrio")
            if self._is_spatial(layer)
            else pyogrio.read_dataframe(self.path, layer=layer)
        )
        if self.id_column in frame.columns:
            frame = frame.set_index(self.id_column)
        if shared is not None:
            shared[key] = frame
            return frame.copy(deep=False)
        return frame

    def read_columns(self, layer: str, columns: Sequence[str]) -> pd.DataFrame:
        """Some columns of a layer, without its geometry, indexed by unit id.

        Much faster than :meth:`read` on a large layer when the geometry is
        not needed (parsing the geometry is most of a read).
        """
        if layer not in self.layers:
            raise InputError(f"trial file {str(self.path)!r} has no layer {layer!r} yet")
        wanted = [self.id_column, *(c for c in columns if c != self.id_column)]
        present = set(pyogrio.read_info(self.path, layer=layer)["fields"])
        missing = [c for c in wanted if c not in present]
        if missing:
            raise InputError(
                f"trial file {str(self.path)!r}, layer {layer!r}: no column(s) {missing}"
            )
        frame = pyogrio.read_dataframe(self.path, layer=layer, columns=wanted, read_geometry=False)
        return pd.DataFrame(frame).set_index(self.id_column)[list(wanted[1:])]

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
        self,
        layers: dict[str, pd.DataFrame],
        meta: dict[str, str] | None = None,
        *,
        wait_s: float | None = None,
        notify: Notify | None = None,
    ) -> TrialFile:
        """Write (overwrite) layers and meta keys atomically under the trial's lock.

        The file is re-read under the lock and ``meta`` is merged into the meta
        it holds then (not into this snapshot's). Frames indexed by unit id are
        written with the id as a column. Returns the re-opened file.
        """

        def change(current: TrialFile) -> _Change:
            flat = {
                name: _flat(frame, current.id_column)
                if frame.index.name == current.id_column
                else frame
                for name, frame in layers.items()
            }
            return _Change(flat, {**current.meta, **meta} if meta else None)

        return update_trial(self.path, change, wait_s=wait_s, notify=notify)


def update_trial(
    path: str | Path,
    change: Callable[[TrialFile], _Change],
    *,
    wait_s: float | None = None,
    notify: Notify | None = None,
) -> TrialFile:
    """Read-modify-write a trial under its lock: ``change`` sees the file as it is now."""
    path = Path(path)
    with trial_lock(path, wait_s=wait_s, notify=notify):
        current = TrialFile.open(path)
        todo = change(current)
        with _failures_named(path), atomic_path(path) as tmp:
            shutil.copy2(path, tmp)
            _drop_attribute_tables(tmp, list(todo.drop))
            for name, frame in todo.layers.items():
                _write(tmp, frame, name)
            meta = todo.meta
            if todo.after is not None:
                meta = {**(meta if meta is not None else current.meta), **todo.after(tmp, current)}
            if meta is not None:
                _write(tmp, _meta_frame(meta), META_LAYER)
        return TrialFile.open(path)


def append_rows(current: TrialFile, layer: str, rows: pd.DataFrame) -> pd.DataFrame:
    """The rows of a record layer (e.g. ``superseded_outcomes``) with ``rows`` appended."""
    if layer in current.layers:
        return pd.concat(
            [pyogrio.read_dataframe(current.path, layer=layer), rows], ignore_index=True
        )
    return rows.reset_index(drop=True)


def _prefixed(meta: dict[str, str], prefix: str) -> dict[str, str]:
    return {k: v for k, v in meta.items() if k.startswith(prefix)}


def superseded_outcomes_rows(current: TrialFile, reason: str, when: str) -> pd.DataFrame | None:
    """The stored outcomes as rows for ``superseded_outcomes`` (None if none are stored)."""
    if OUTCOMES_LAYER not in current.layers:
        return None
    rows = pyogrio.read_dataframe(current.path, layer=OUTCOMES_LAYER)
    info = {
        "draw_number": current.draw_number,
        **_prefixed(current.meta, "outcomes_"),
        "superseded_at": when,
        "superseded_reason": reason,
    }
    return pd.concat([pd.DataFrame(info, index=rows.index), rows], axis=1)


def superseded_results_rows(current: TrialFile, reason: str, when: str) -> pd.DataFrame | None:
    """The stored results as rows for ``superseded_results`` (None if none are stored)."""
    if RESULTS_LAYER not in current.layers:
        return None
    rows = pyogrio.read_dataframe(current.path, layer=RESULTS_LAYER)
    info = {
        "draw_number": current.draw_number,
        **_prefixed(current.meta, "results_"),
        "superseded_at": when,
        "superseded_reason": reason,
    }
    return pd.concat([pd.DataFrame(info, index=rows.index), rows], axis=1)


def _without(meta: dict[str, str], *prefixes: str) -> dict[str, str]:
    return {k: v for k, v in meta.items() if not k.startswith(prefixes)}


def retire_results(current: TrialFile, reason: str) -> _Change:
    """A change that moves stored results into ``superseded_results`` (for new outcomes)."""
    rows = superseded_results_rows(current, reason, _now())
    if rows is None:
        return _Change()
    return _Change(
        {SUPERSEDED_RESULTS: append_rows(current, SUPERSEDED_RESULTS, rows)},
        _without(current.meta, "results_"),
        (RESULTS_LAYER,),
    )


def write_trial(
    path: str | Path,
    design: Design,
    assignment: Assignment,
    probabilities: ExposureProbabilities | None = None,
    *,
    replace: bool = False,
    reason: str = "",
    wait_s: float | None = None,
    notify: Notify | None = None,
) -> TrialFile:
    """Write a drawn design into a trial GeoPackage, atomically and under its lock, and lock it.

    If the file already holds a drawn assignment, this refuses with
    :class:`LockedTrialError` unless ``replace=True`` with a ``reason``.
    Replacing keeps everything: the previous assignment is appended to
    ``superseded_assignments`` (with the time it was replaced and ``reason``),
    its stored outcomes and results to ``superseded_outcomes`` and
    ``superseded_results``, and its whole meta (spec, seed, fingerprints) to
    ``superseded_meta``, each row with the draw number it belonged to. The
    new draw has no outcomes or results until they are stored again.

    Parameters
    ----------
    path : path
        The trial GeoPackage (created if missing).
    design, assignment, probabilities
        The design, the assignment drawn from it and (optionally) its
        exposure probabilities.
    replace : bool
        Replace a drawn assignment on purpose.
    reason : str
        Why (required with ``replace=True``; recorded).
    wait_s : float, optional
        Seconds to wait for another command writing the same trial.
    notify : callable, optional
        Receives notes such as "waiting for another geoexp command ...".

    Returns
    -------
    TrialFile
        The trial file, opened again after the write.

    Raises
    ------
    geoexp.errors.LockedTrialError
        The trial holds an assignment and ``replace`` is False.
    geoexp.errors.InputError
        ``replace=True`` without a reason, or an assignment of another design.
    geoexp.errors.TrialBusyError, geoexp.errors.TrialWriteError
        Another writer did not finish in time; the write failed (the file is untouched).
    """
    from geoexp.design import spec_identity, unit_digests, used_columns

    path = Path(path)
    if replace and not str(reason).strip():
        raise InputError(
            f"replacing the assignment in {str(path)!r} needs a reason, which is recorded beside "
            "the replaced assignment (command line: --reason '...')"
        )
    units, spec = design.units, design.spec
    if assignment.spec_hash != spec.hash:
        raise InputError(
            f"the assignment was drawn from design {assignment.spec_hash[:12]}, "
            f"not from this design ({spec.hash[:12]})"
        )
    fingerprint = design.fingerprint
    id_column = units.id_column
    unit_frame = units.frame.copy()
    unit_frame["eligible"] = design.eligible
    table = assignment.to_frame()
    if probabilities is not None:
        table = table.join(probabilities.to_frame())
    assign_frame = gpd.GeoDataFrame(
        table, geometry=units.frame.geometry.reindex(table.index), crs=units.crs
    )
    columns = used_columns(spec, [c for c in units.frame.columns if c != "geometry"])
    digests = unit_digests(units, columns)

    with trial_lock(path, wait_s=wait_s, notify=notify):
        previous = TrialFile.open(path) if path.exists() else None
        if previous is not None and previous.is_locked and not replace:
            raise LockedTrialError(
                f"trial file {str(path)!r} already holds an assignment drawn on "
                f"{previous.meta.get('drawn_at', '?')} with seed {previous.meta.get('seed', '?')} "
                f"(design {(previous.design_fingerprint or previous.spec_hash)[:12]}). It is "
                "locked so that it cannot be redrawn silently. To draw again on purpose, ask to "
                "replace it and say why (command line: --replace --reason '...'); the current "
                "assignment, its outcomes and results will be kept in the 'superseded_*' layers."
            )
        records: dict[str, pd.DataFrame] = {}
        drop: list[str] = []
        if previous is not None and previous.is_locked:
            when = _now()
            number = previous.draw_number or 1
            old = pd.DataFrame(
                previous.read("assignment").drop(columns="geometry", errors="ignore")
            )
            old = old.reset_index()[[previous.id_column, "treated", "condition"]]
            old.insert(0, "draw_number", number)
            old["spec_hash"] = previous.spec_hash
            old["design_fingerprint"] = previous.design_fingerprint
            old["seed"] = previous.meta.get("seed", "")
            old["drawn_at"] = previous.meta.get("drawn_at", "")
            old["superseded_at"] = when
            old["reason"] = reason
            records[SUPERSEDED_ASSIGNMENTS] = append_rows(previous, SUPERSEDED_ASSIGNMENTS, old)
            meta_rows = _meta_frame(previous.meta)
            meta_rows.insert(0, "draw_number", number)
            meta_rows["superseded_at"] = when
            meta_rows["reason"] = reason
            records[SUPERSEDED_META] = append_rows(previous, SUPERSEDED_META, meta_rows)
            outcomes = superseded_outcomes_rows(previous, reason, when)
            if outcomes is not None:
                records[SUPERSEDED_OUTCOMES] = append_rows(previous, SUPERSEDED_OUTCOMES, outcomes)
            results = superseded_results_rows(previous, reason, when)
            if results is not None:
                records[SUPERSEDED_RESULTS] = append_rows(previous, SUPERSEDED_RESULTS, results)
            drop = [OUTCOMES_LAYER, RESULTS_LAYER, "probabilities"]
        draw_number = 1 + (previous.draw_number if previous and previous.is_locked else 0)
        meta = {
            "format": "geoexp trial",
            "format_version": FORMAT_VERSION,
            "name": spec.name,
            "id_column": id_column,
            "spec_toml": spec.to_toml(),
            "spec_json": json.dumps(spec_identity(spec), sort_keys=True),
            "spec_base_dir": spec.base_dir,
            "spec_hash": spec.hash,
            "design_fingerprint": fingerprint.digest,
            "design_fingerprint_parts": fingerprint.to_json(),
            "tool_version": fingerprint.parts["tool_version"],
            "seed": str(spec.seed),
            "units_source": units.source,
            "crs_report": units.crs_report,
            "coordinates": units.crs_label,
            "network": json.dumps(design.graph.network.to_dict())
            if design.graph.network is not None
            else "",
            "metres_per_unit": repr(units.metres_per_unit),
            "distance_unit": "metre",
            "drawn_at": assignment.drawn_at,
            "draw_number": str(draw_number),
            "n_draws": str(probabilities.n_draws if probabilities is not None else 0),
            "locked": "true",
            "created_at": previous.meta.get("created_at", _now()) if previous else _now(),
        }
        with _failures_named(path), atomic_path(path) as tmp:
            if previous is not None:
                # keep every layer this write does not replace (records, anything added later)
                shutil.copy2(path, tmp)
                _drop_attribute_tables(tmp, drop)
            _write(tmp, _flat(unit_frame, id_column), "units")
            _write(tmp, _flat(assign_frame, id_column), "assignment")
            _write(tmp, _flat(digests, id_column), UNIT_DIGESTS_LAYER)
            if probabilities is not None:
                _write(tmp, _flat(probabilities.to_frame(), id_column), "probabilities")
            for name, frame in records.items():
                _write(tmp, frame, name)
            _write(tmp, _meta_frame(meta), META_LAYER)
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

    Parameters
    ----------
    trial : TrialFile, str or pathlib.Path
        The trial file (or its path).
    path : str or pathlib.Path
        The CSV file to write (UTF-8, written atomically).
    district_column : str, optional
        Unit column giving the district (default: the spec's
        ``district_column``).
    description_column : str, optional
        Unit column describing the place, e.g. the street and cross streets
        (default: the spec's ``description_column``).
    instructions_column : str, optional
        Unit column with instructions for the field team (default: the spec's
        ``instructions_column``).

    Returns
    -------
    pandas.DataFrame
        The rows written, indexed by unit id: the named columns, ``condition``
        (its label) and ``treated``; eligible units only, treated first, then
        by condition.

    Raises
    ------
    geoexp.errors.InputError
        A named column is not in the unit layer.
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
