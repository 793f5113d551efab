"""Outcomes and results stored in a trial file, each with the fingerprints it belongs to.

Storing new outcomes keeps the earlier ones (and the results computed from
them) in ``superseded_outcomes`` and ``superseded_results``; storing new
results keeps the earlier results. Results are refused if the trial's design
or outcomes changed after the analysis that made them.
"""

from __future__ import annotations

import os
from pathlib import Path

import pandas as pd
import pyogrio

from geoexp.errors import InputError, TrialIntegrityError, describe_rows
from geoexp.trialfile._file import (
    OUTCOMES_LAYER,
    RESULTS_LAYER,
    SUPERSEDED_OUTCOMES,
    SUPERSEDED_RESULTS,
    TrialFile,
    _Change,
    _flat,
    _now,
    _without,
    append_rows,
    superseded_outcomes_rows,
    superseded_results_rows,
    update_trial,
)
from geoexp.trialfile._integrity import outcomes_fingerprint, results_fingerprint
from geoexp.trialfile._lock import Notify

__all__ = ["append_record", "store_outcomes", "store_results"]


def store_outcomes(
    trial: TrialFile | str | os.PathLike[str],
    counts: pd.DataFrame,
    meta: dict[str, str],
    *,
    wait_s: float | None = None,
    notify: Notify | None = None,
) -> TrialFile:
    """Store counts per unit (indexed by unit id) and ``outcomes_*`` meta, under the lock.

    The ids are checked against the units the file holds at the time of
    writing. ``meta`` must hold ``outcomes_pre`` and ``outcomes_post``
    (``"start/end"``); the outcomes fingerprint, the draw number and the time
    are added. Earlier outcomes and any results go to the superseded layers.

    Parameters
    ----------
    trial : TrialFile, str or os.PathLike
        The trial file (or its path).
    counts : pandas.DataFrame
        Incident counts per unit, indexed by unit id, one row for every unit
        the trial holds.
    meta : dict of str to str
        ``outcomes_*`` meta entries, with ``outcomes_pre`` and
        ``outcomes_post`` as ``"start/end"`` dates.
    wait_s : float, optional
        Seconds to wait for another writer of the same trial.
    notify : callable, optional
        Receives plain-words notes (a wait for another writer, say).

    Returns
    -------
    TrialFile
        The trial file, opened again after the write.

    Raises
    ------
    geoexp.errors.InputError
        ``counts`` names ids the trial lacks or misses some of its units (the
        message names both counts and the first rows).
    """
    path = Path(trial.path if isinstance(trial, TrialFile) else trial)

    def change(current: TrialFile) -> _Change:
        unit_ids = current.units().index
        unknown = counts.index[~counts.index.isin(unit_ids)]
        absent = unit_ids[~unit_ids.isin(counts.index)]
        if len(unknown) or len(absent):
            raise InputError(
                f"the outcome table does not match the units of trial file '{current.path}': "
                f"{len(unknown):,} ids not in the trial ({describe_rows(list(unknown))}) and "
                f"{len(absent):,} trial units without counts ({describe_rows(list(absent))})"
            )
        frame = counts.reindex(unit_ids)
        frame.index.name = current.id_column
        when = _now()
        layers: dict[str, pd.DataFrame] = {OUTCOMES_LAYER: _flat(frame, current.id_column)}
        drop: list[str] = []
        old = superseded_outcomes_rows(current, "outcomes stored again", when)
        if old is not None:
            layers[SUPERSEDED_OUTCOMES] = append_rows(current, SUPERSEDED_OUTCOMES, old)
        results = superseded_results_rows(current, "outcomes stored again", when)
        if results is not None:
            layers[SUPERSEDED_RESULTS] = append_rows(current, SUPERSEDED_RESULTS, results)
            drop.append(RESULTS_LAYER)
        new_meta = {
            **_without(current.meta, "outcomes_", "results_"),
            **meta,
            "outcomes_saved_at": when,
            "outcomes_draw_number": str(current.draw_number),
        }

        def after(tmp: Path, _current: TrialFile) -> dict[str, str]:
            stored = pyogrio.read_dataframe(tmp, layer=OUTCOMES_LAYER).set_index(current.id_column)
            return {
                "outcomes_fingerprint": outcomes_fingerprint(
                    stored, meta["outcomes_pre"], meta["outcomes_post"]
                )
            }

        return _Change(layers, new_meta, tuple(drop), after)

    return update_trial(path, change, wait_s=wait_s, notify=notify)


def store_results(
    trial: TrialFile | str | os.PathLike[str],
    table: pd.DataFrame,
    meta: dict[str, str],
    *,
    design_fingerprint: str = "",
    outcomes_fingerprint: str = "",
    spec_hash: str = "",
    wait_s: float | None = None,
    notify: Notify | None = None,
) -> TrialFile:
    """Store a results table and ``results_*`` meta, refusing results of another design.

    Under the lock the trial's current design fingerprint (or spec hash, for
    results without fingerprints) and outcomes fingerprint must be the ones
    the results were computed from; otherwise the trial changed since the
    analysis (a redraw, new counts) and the results would be filed under the
    wrong design. Earlier results go to ``superseded_results``.

    Parameters
    ----------
    trial : TrialFile, str or os.PathLike
        The trial file (or its path).
    table : pandas.DataFrame
        The results table to store.
    meta : dict of str to str
        ``results_*`` meta entries.
    design_fingerprint : str, default ""
        Design fingerprint (64 hex digits) the results were computed for;
        empty to check ``spec_hash`` instead.
    outcomes_fingerprint : str, default ""
        Fingerprint of the outcomes the results were computed from; empty to
        skip that check.
    spec_hash : str, default ""
        Spec hash, checked only when ``design_fingerprint`` is empty.
    wait_s : float, optional
        Seconds to wait for another writer of the same trial.
    notify : callable, optional
        Receives plain-words notes (a wait for another writer, say).

    Returns
    -------
    TrialFile
        The trial file, opened again after the write.

    Raises
    ------
    geoexp.errors.TrialIntegrityError
        The trial's design or stored outcomes are not those the results were
        computed from.
    """
    path = Path(trial.path if isinstance(trial, TrialFile) else trial)

    def change(current: TrialFile) -> _Change:
        now_design = current.design_fingerprint
        if design_fingerprint and now_design and design_fingerprint != now_design:
            raise TrialIntegrityError(
                f"trial file '{current.path}' changed since this analysis: it was computed for "
                f"design {design_fingerprint[:12]} and the file now holds design "
                f"{now_design[:12]} (draw {current.draw_number}); analyse the trial again"
            )
        if not design_fingerprint and spec_hash and spec_hash != current.spec_hash:
            raise TrialIntegrityError(
                f"trial file '{current.path}' holds design {current.spec_hash[:12]}, not the "
                f"design {spec_hash[:12]} this analysis was computed for; analyse it again"
            )
        now_outcomes = current.meta.get("outcomes_fingerprint", "")
        if outcomes_fingerprint and now_outcomes and outcomes_fingerprint != now_outcomes:
            raise TrialIntegrityError(
                f"the outcomes stored in trial file '{current.path}' (saved "
                f"{current.meta.get('outcomes_saved_at', '?')}, fingerprint {now_outcomes[:12]}) "
                f"are not the ones this analysis used ({outcomes_fingerprint[:12]}); store the "
                "outcomes the analysis used, or analyse the stored ones"
            )
        when = _now()
        layers: dict[str, pd.DataFrame] = {RESULTS_LAYER: table}
        old = superseded_results_rows(current, "analysed again", when)
        if old is not None:
            layers[SUPERSEDED_RESULTS] = append_rows(current, SUPERSEDED_RESULTS, old)
        new_meta = {
            **_without(current.meta, "results_"),
            **meta,
            "results_design_fingerprint": design_fingerprint or now_design,
            "results_outcomes_fingerprint": outcomes_fingerprint or now_outcomes,
            "results_draw_number": str(current.draw_number),
            "results_saved_at": when,
        }

        def after(tmp: Path, _current: TrialFile) -> dict[str, str]:
            stored = pyogrio.read_dataframe(tmp, layer=RESULTS_LAYER)
            return {"results_fingerprint": results_fingerprint(stored)}

        return _Change(layers, new_meta, (), after)

    return update_trial(path, change, wait_s=wait_s, notify=notify)


# Layers a record may never be appended to: the trial's own tables.
_OWN_LAYERS = ("units", "assignment", "probabilities", "unit_fingerprints", "trial_meta")


def append_record(
    trial: TrialFile | str | os.PathLike[str],
    layer: str,
    rows: pd.DataFrame,
    *,
    wait_s: float | None = None,
    notify: Notify | None = None,
) -> TrialFile:
    """Append dated rows to a record layer (e.g. ``delivery_weekly``) under the trial's lock.

    The layer is read afresh under the lock and the rows are added after the
    ones it holds, so two writers never lose each other's rows. The trial's
    own layers (units, assignment, probabilities, fingerprints, meta) and the
    outcome and result layers are refused: a record never overwrites them.

    Parameters
    ----------
    trial : TrialFile or path
        The trial GeoPackage.
    layer : str
        The record layer.
    rows : pandas.DataFrame
        The rows to add (their index is dropped).
    wait_s : float, optional
        Seconds to wait for another writer (default 120 s).
    notify : callable, optional
        Receives plain-words notes, e.g. that this call waits for another writer.

    Returns
    -------
    TrialFile
        The trial as written.

    Raises
    ------
    geoexp.errors.InputError
        ``layer`` is one of the trial's own layers.
    """
    if (
        layer in _OWN_LAYERS
        or layer in (OUTCOMES_LAYER, RESULTS_LAYER)
        or layer.startswith("superseded_")
    ):
        raise InputError(
            f"layer {layer!r} belongs to the trial itself; records go to a layer of their own"
        )
    path = Path(trial.path if isinstance(trial, TrialFile) else trial)

    def change(current: TrialFile) -> _Change:
        return _Change({layer: append_rows(current, layer, rows.reset_index(drop=True))})

    return update_trial(path, change, wait_s=wait_s, notify=notify)
