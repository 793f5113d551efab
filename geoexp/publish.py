"""A trial's tables written to a PostGIS database for an agency's own dashboards.

The trial file stays the record; the database gets copies that plain SQL can
read. :func:`write_trial_tables` writes, in one transaction, into a schema
(``geoexp`` unless told otherwise), each name after an optional prefix:

``trial`` (one row)
    ``name`` text, ``spec_hash`` text, ``design_fingerprint`` text,
    ``draw_number`` bigint, ``id_column`` text (the units' own id column),
    ``crs`` text, ``distance_unit`` text, ``drawn_at`` text (ISO 8601 UTC),
    ``pre_period`` and ``post_period`` text (``start/end`` dates, both
    included; empty before counting), ``results_saved_at`` text,
    ``written_at`` text, ``geoexp_version`` text, ``caution`` text.
``assignment`` (one row per unit)
    ``unit_id`` (text or bigint, as the units' ids), ``eligible`` boolean,
    ``treated`` boolean, ``condition`` text (``treated``, ``spillover_1``,
    ... , ``pure_control``), ``condition_label`` text (with its distances in
    metres), ``p_<condition>`` double precision (the probability of each
    exposure condition), ``se_<condition>`` double precision (its Monte Carlo
    standard error), ``geometry`` PostGIS geometry with the trial CRS's SRID.
``outcomes`` (one row per unit; once counted)
    ``unit_id``, ``pre`` and ``post`` bigint: incidents in each period, plus
    ``pre__<type>``/``post__<type>`` columns when counted by type.
``results`` (one row per contrast; once analysed)
    ``contrast`` text, ``outcome`` text, ``estimator`` text, ``estimate``,
    ``std_error``, ``ci_low``, ``ci_high``, ``ri_ci_low``, ``ri_ci_high``,
    ``p_value``, ``mc_error`` ... double precision, ``n_units`` ...
    bigint, ``finding`` text, and ``effect_unit`` text: what ``estimate``,
    its interval and ``mean_exposed``/``mean_reference`` count (incidents per
    unit over the period, or its change); ``percent_of_reference`` is a
    percentage.

No password is written anywhere: the URL is named with the password masked.
"""

from __future__ import annotations

import datetime as dt
import os
from pathlib import Path

import pandas as pd

from geoexp.cautions import CAUTION
from geoexp.errors import InputError
from geoexp.postgis import check_name, write_tables
from geoexp.trialfile import TrialFile

__all__ = ["TABLES", "write_trial_tables"]

TABLES = ("trial", "assignment", "outcomes", "results")


def _effect_unit(outcome: str) -> str:
    if outcome.startswith("change"):
        return "incidents per unit: change from the pre-period to the post-period"
    return "incidents per unit in the post-period"


def _with_unit_id(frame: pd.DataFrame) -> pd.DataFrame:
    out = frame.reset_index()
    first = out.columns[0]
    return out.rename(columns={first: "unit_id"})


def trial_frames(trial: TrialFile) -> dict[str, pd.DataFrame]:
    """Return the rows of each table as frames (``assignment`` a GeoDataFrame), unprefixed."""
    meta = trial.meta
    if "assignment" not in trial.layers:
        raise InputError(f"trial file '{trial.path}' holds no drawn assignment yet")
    from geoexp import __version__

    results_outcome = meta.get("results_outcome", "")
    frames: dict[str, pd.DataFrame] = {
        "trial": pd.DataFrame(
            {
                "name": [meta.get("name", "")],
                "spec_hash": [trial.spec_hash],
                "design_fingerprint": [trial.design_fingerprint],
                "draw_number": [trial.draw_number],
                "id_column": [trial.id_column],
                "crs": [meta.get("crs_report", "")],
                "distance_unit": [meta.get("distance_unit", "metre")],
                "drawn_at": [meta.get("drawn_at", "")],
                "pre_period": [meta.get("outcomes_pre", "")],
                "post_period": [meta.get("outcomes_post", "")],
                "results_saved_at": [meta.get("results_saved_at", "")],
                "written_at": [dt.datetime.now(dt.UTC).isoformat(timespec="seconds")],
                "geoexp_version": [__version__],
                "caution": [CAUTION],
            }
        ),
        "assignment": _with_unit_id(trial.assignment()),
    }
    if "outcomes" in trial.layers:
        frames["outcomes"] = _with_unit_id(trial.read("outcomes"))
    if "results" in trial.layers:
        results = trial.read("results").reset_index(drop=True)
        outcome = results["outcome"] if "outcome" in results else results_outcome
        results["effect_unit"] = pd.Series(outcome, index=results.index).map(
            lambda o: _effect_unit(str(o))
        )
        frames["results"] = results
    return frames


def write_trial_tables(
    trial: str | os.PathLike | TrialFile,
    url: str,
    *,
    schema: str = "geoexp",
    prefix: str = "",
    replace: bool = False,
) -> list[str]:
    """Write a trial's assignment, probabilities, outcomes and results as database tables.

    Parameters
    ----------
    trial : path or TrialFile
        A trial file with a drawn assignment; outcomes and results are
        written when the file holds them.
    url : str
        libpq URL of the database (``postgresql://...``); a password is best
        left to ``PGPASSWORD``, ``~/.pgpass`` or a service file.
    schema : str
        Schema to write into (created if missing); a plain SQL name.
    prefix : str
        Put before each table name (e.g. ``"patrols_2026_"``), to keep several
        trials in one schema.
    replace : bool
        Replace tables of the same names. Without it nothing is written when
        any of them exists.

    Returns
    -------
    list of str
        The tables written, ``schema.name``.
    """
    tf = trial if isinstance(trial, TrialFile) else TrialFile.open(Path(trial))
    if prefix:
        check_name(prefix, "table prefix")
    frames = trial_frames(tf)
    return write_tables(
        url,
        {f"{prefix}{name}": frame for name, frame in frames.items()},
        schema=schema,
        replace=replace,
    )
