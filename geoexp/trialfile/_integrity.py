"""Does a trial file still hold what was recorded when it was written?

:func:`verify_trial` recomputes the design fingerprint from what the file
stores (its spec, its units layer with the eligible column, the exclusion-zone
files if they can still be reached) and the outcomes fingerprint from the
stored counts and periods, and says in plain words what differs.
"""

from __future__ import annotations

import datetime as dt
import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import cast

import numpy as np
import pandas as pd
import pyogrio

from geoexp.errors import TrialIntegrityError, describe_rows
from geoexp.trialfile._file import (
    OUTCOMES_LAYER,
    RESULTS_LAYER,
    UNIT_DIGESTS_LAYER,
    TrialFile,
)
from geoexp.trialfile._lock import Notify, _say

__all__ = ["TrialIntegrity", "outcomes_fingerprint", "results_fingerprint", "verify_trial"]


def _period_text(period: object) -> str:
    if isinstance(period, str):
        return period
    start, end = cast("tuple[object, object]", period)
    return f"{start}/{end}"


def outcomes_fingerprint(
    counts: pd.DataFrame, pre: tuple[dt.date, dt.date] | str, post: tuple[dt.date, dt.date] | str
) -> str:
    """SHA-256 of a table of counts (ids, columns, values in order) and its two periods.

    ``pre`` and ``post`` are ``(start, end)`` dates or the ``"start/end"`` text
    stored in trial files. Counts that are not whole numbers give a fingerprint
    that matches no saved table.

    Parameters
    ----------
    counts : pandas.DataFrame
        Incident counts per unit, indexed by unit id; a ``geometry`` column, if
        any, is left out of the fingerprint.
    pre : tuple of datetime.date or str
        The period before treatment, ``(start, end)`` or ``"start/end"``.
    post : tuple of datetime.date or str
        The period after treatment, in the same form.

    Returns
    -------
    str
        The SHA-256 digest, 64 hexadecimal digits.
    """
    from geoexp.design import frame_digest

    frame = pd.DataFrame(counts).drop(columns="geometry", errors="ignore")
    try:
        frame = frame.astype(np.int64)
    except (TypeError, ValueError):
        pass
    periods = pd.DataFrame({"pre": [_period_text(pre)], "post": [_period_text(post)]})
    return frame_digest(pd.DataFrame({"digest": [frame_digest(frame)]}).join(periods), index=False)


def results_fingerprint(table: pd.DataFrame) -> str:
    """SHA-256 of a results table as stored.

    Parameters
    ----------
    table : pandas.DataFrame
        The results table, as written to the trial file.

    Returns
    -------
    str
        The SHA-256 digest of its values in order (index left out), 64
        hexadecimal digits.
    """
    from geoexp.design import frame_digest

    return frame_digest(pd.DataFrame(table), index=False)


@dataclass(frozen=True)
class TrialIntegrity:
    """What :func:`verify_trial` found.

    Attributes
    ----------
    path : str
        The trial file.
    design_fingerprint : str
        The design fingerprint recomputed from the file (64 hex digits).
    outcomes_fingerprint : str or None
        The stored outcomes' fingerprint recomputed (None without outcomes).
    tool_version, stored_tool_version : str
        The running geoexp and the one that drew the assignment.
    problems : tuple of str
        What changed since it was recorded (any problem is a refusal).
    notes : tuple of str
        What could not be checked or differs harmlessly (a warning).
    """

    path: str
    design_fingerprint: str
    outcomes_fingerprint: str | None
    tool_version: str
    stored_tool_version: str
    problems: tuple[str, ...] = ()
    notes: tuple[str, ...] = ()

    @property
    def ok(self) -> bool:
        """True when nothing recorded has changed."""
        return not self.problems

    def __str__(self) -> str:
        head = (
            f"Trial file {self.path}: design {self.design_fingerprint[:12]}"
            + (
                f", outcomes {self.outcomes_fingerprint[:12]}"
                if self.outcomes_fingerprint
                else ", no outcomes stored"
            )
            + (" (as recorded)" if self.ok else "")
        )
        lines = [head]
        lines += [f"  changed: {p}" for p in self.problems]
        lines += [f"  note: {n}" for n in self.notes]
        return "\n".join(lines)


def _flatten(value: object, prefix: str = "") -> dict[str, object]:
    if isinstance(value, dict):
        out: dict[str, object] = {}
        for k, v in value.items():
            out.update(_flatten(v, f"{prefix}.{k}" if prefix else str(k)))
        return out
    return {prefix: value}


def _spec_changes(before: dict, after: dict) -> list[str]:
    a, b = _flatten(before), _flatten(after)
    return sorted(k for k in set(a) | set(b) if a.get(k) != b.get(k))


def verify_trial(
    trial: TrialFile | str | os.PathLike[str],
    *,
    notify: Notify | None = None,
    strict: bool = True,
) -> TrialIntegrity:
    """Recompute a trial's fingerprints from what it stores and compare them with the record.

    Checked: the stored spec against its recorded hash and canonical form; the
    units layer's ids, geometry, eligible column and the columns the design uses
    (naming the units that changed); each exclusion-zone file, if it can still
    be reached (a zone file that is gone is a note: the eligibility recorded in
    the trial stands); the stored outcomes against their fingerprint; the stored
    results against theirs. A different geoexp version is a note, not a refusal.

    Parameters
    ----------
    trial : TrialFile or path
        The trial GeoPackage (re-read from disk).
    notify : callable, optional
        Receives the notes (default: the ``geoexp.trialfile`` logger).
    strict : bool
        Raise on any problem (default). With False the problems are returned.

    Returns
    -------
    TrialIntegrity

    Raises
    ------
    geoexp.errors.TrialIntegrityError
        Something recorded has changed; the message says what.
    """
    from geoexp.design import DesignFingerprint, design_fingerprint, spec_identity, tool_version
    from geoexp.units import UnitSet

    path = Path(trial.path if isinstance(trial, TrialFile) else trial)
    tf = TrialFile.open(path)
    meta = tf.meta
    layers = tf.layers
    problems: list[str] = []
    notes: list[str] = []
    running = tool_version()
    spec = tf.spec()
    frame = tf.units()
    eligible = (
        frame["eligible"].astype(bool).to_numpy()
        if "eligible" in frame.columns
        else np.zeros(len(frame), dtype=bool)
    )
    if "eligible" not in frame.columns:
        problems.append("the units layer has lost its 'eligible' column")
    units = UnitSet.from_frame(
        frame.drop(columns=["eligible"], errors="ignore"), None, source=f"{path} (units layer)"
    )
    stored_json = meta.get("design_fingerprint_parts")
    if not stored_json:
        now = design_fingerprint(spec, units, eligible)
        notes.append(
            "this trial file was written before geoexp recorded design fingerprints; only the "
            "redraw of its assignment from the stored spec and seed can be checked"
        )
        result = TrialIntegrity(str(path), now.digest, None, running, "", (), tuple(notes))
        for n in notes:
            _say(notify, n)
        return result
    stored = DesignFingerprint.from_json(stored_json)
    parts = stored.parts
    stored_version = str(parts.get("tool_version", ""))

    if spec.hash != meta.get("spec_hash"):
        changed = []
        if meta.get("spec_json"):
            changed = _spec_changes(json.loads(meta["spec_json"]), spec_identity(spec))
        problems.append(
            "the design spec stored in the trial (trial_meta 'spec_toml') was edited after the "
            "draw" + (f": changed {', '.join(changed)}" if changed else "")
        )

    zone_digests: list[str | None] = []
    stored_zones = list(parts.get("zones", []))
    from geoexp.design import zone_digest

    for i, zone in enumerate(spec.eligible.exclude):
        where = spec.resolve(zone)
        digest = zone_digest(where)
        if digest is None:
            notes.append(
                f"exclusion zone file {str(where)!r} can no longer be found, so its content was not "
                "checked; the eligible units recorded in the trial are used"
            )
            digest = stored_zones[i] if i < len(stored_zones) else None
        elif i < len(stored_zones) and digest != stored_zones[i]:
            problems.append(
                f"exclusion zone file {str(where)!r} differs from the one the design was drawn "
                "with (its CRS or geometries changed)"
            )
        zone_digests.append(digest)

    now = design_fingerprint(
        spec, units, eligible, zone_digests=zone_digests, version=stored_version
    )
    digests = tf.read(UNIT_DIGESTS_LAYER) if UNIT_DIGESTS_LAYER in layers else None
    if now.parts["ids"] != parts.get("ids"):
        if digests is not None:
            added = units.ids.difference(digests.index)
            removed = digests.index.difference(units.ids)
            what = []
            if len(added):
                what.append(f"{len(added)} added ({describe_rows(list(added))})")
            if len(removed):
                what.append(f"{len(removed)} removed ({describe_rows(list(removed))})")
            problems.append(
                "the unit ids of the units layer changed: "
                + ("; ".join(what) if what else "the same ids in another order")
            )
        else:
            problems.append("the unit ids of the units layer changed")
    if now.parts["geometry"] != parts.get("geometry"):
        from geoexp.design import unit_digests

        moved: list[object] = []
        if digests is not None:
            fresh = unit_digests(units, [])
            common = fresh.index.intersection(digests.index)
            diff = fresh.loc[common, "geometry_hash"] != digests.loc[common, "geometry_hash"]
            moved = list(common[diff.to_numpy()])
        problems.append(
            f"the geometry of {len(moved) or 'some'} unit{'s' if len(moved) != 1 else ''} in the "
            "units layer changed" + (f": {describe_rows(moved)}" if moved else " (or its CRS)")
        )
    if now.parts["eligible"] != parts.get("eligible"):
        problems.append("the 'eligible' column of the units layer changed")
    stored_columns = dict(parts.get("columns", {}))
    edited = [
        c
        for c in sorted(stored_columns)
        if c in units.frame.columns and now.parts["columns"].get(c) != stored_columns[c]
    ]
    which: list[object] = []
    if edited and digests is not None:
        from geoexp.design import unit_digests

        # the per-unit hashes cover the used columns together, in the order they were stored
        rows = unit_digests(units, sorted(stored_columns))
        common = rows.index.intersection(digests.index)
        diff = rows.loc[common, "columns_hash"] != digests.loc[common, "columns_hash"]
        which = list(common[diff.to_numpy()])
    for column in sorted(stored_columns):
        if column not in units.frame.columns:
            problems.append(
                f"column {column!r}, which the design uses, is gone from the units layer"
            )
        elif column in edited:
            problems.append(
                f"column {column!r}, which the design uses, was edited in the units layer"
                + (f" (units {describe_rows(which)})" if which else "")
            )
    if stored_version and stored_version != running:
        notes.append(
            f"the assignment was drawn with geoexp {stored_version}; this is geoexp {running}. "
            "The design was checked against what was recorded; the Monte Carlo may differ in "
            "its last digits"
        )
    if not problems and now.digest != meta.get("design_fingerprint"):
        problems.append("the recorded design fingerprint does not match its recorded parts")

    outcomes_fp: str | None = None
    if OUTCOMES_LAYER in layers:
        counts = tf.read(OUTCOMES_LAYER)
        outcomes_fp = outcomes_fingerprint(
            counts, meta.get("outcomes_pre", ""), meta.get("outcomes_post", "")
        )
        recorded = meta.get("outcomes_fingerprint")
        if recorded and recorded != outcomes_fp:
            problems.append(
                "the stored outcomes (layer 'outcomes' or their periods) were edited after they "
                f"were saved on {meta.get('outcomes_saved_at', '?')}"
            )
        elif not recorded:
            notes.append(
                "the stored outcomes were saved without a fingerprint and were not checked"
            )
    if RESULTS_LAYER in layers and meta.get("results_fingerprint"):
        table = pyogrio.read_dataframe(path, layer=RESULTS_LAYER)
        if results_fingerprint(table) != meta["results_fingerprint"]:
            notes.append(
                "the stored results (layer 'results') were edited after they were written; "
                "analysing again keeps them in 'superseded_results'"
            )
    result = TrialIntegrity(
        str(path), now.digest, outcomes_fp, running, stored_version, tuple(problems), tuple(notes)
    )
    for n in notes:
        _say(notify, n)
    if problems and strict:
        raise TrialIntegrityError(
            f"trial file {str(path)!r} no longer holds what was recorded when it was written: "
            + "; ".join(problems)
            + ". geoexp will not analyse a trial whose design or outcomes changed after they "
            "were recorded; restore the file from a copy, or draw or count again on purpose."
        )
    return result
