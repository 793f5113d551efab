"""The trial file: one GeoPackage holding everything about a trial.

Layers: ``units`` (the unit layer with eligibility), ``assignment`` (drawn
treatment, exposure condition and probabilities per unit, with geometry so
a desktop GIS can show it), ``probabilities``, ``unit_fingerprints`` (a hash
per unit, to name units edited later), ``trial_meta`` (the spec as TOML, its
hash, the design fingerprint, the tool version, the seed, the lock) and later
``outcomes`` and ``results``. Nothing is ever lost: ``superseded_assignments``,
``superseded_outcomes``, ``superseded_results`` and ``superseded_meta`` keep
every replaced assignment, outcome table and result with the draw number it
belonged to.

Every write holds the trial's lock (``<trial>.lock``, one writer at a time),
re-reads the file under it, writes a temporary copy and renames it over the
file, so a crash never leaves a half-written trial and two commands never
undo each other's writes. A trial whose assignment is drawn is locked:
drawing again raises :class:`~geoexp.errors.LockedTrialError` unless the caller
asks to replace it and gives a reason. :func:`verify_trial` recomputes the
design and outcomes fingerprints from what the file holds and says what
changed.
"""

from geoexp.trialfile._file import TrialFile, export_assignment_csv, shared_reads, write_trial
from geoexp.trialfile._integrity import (
    TrialIntegrity,
    outcomes_fingerprint,
    results_fingerprint,
    verify_trial,
)
from geoexp.trialfile._lock import DEFAULT_WAIT_S, lock_path, trial_lock
from geoexp.trialfile._rebuild import design_from_trial
from geoexp.trialfile._records import append_record, store_outcomes, store_results

__all__ = [
    "append_record",
    "DEFAULT_WAIT_S",
    "TrialFile",
    "TrialIntegrity",
    "design_from_trial",
    "export_assignment_csv",
    "lock_path",
    "outcomes_fingerprint",
    "results_fingerprint",
    "shared_reads",
    "store_outcomes",
    "store_results",
    "trial_lock",
    "verify_trial",
    "write_trial",
]
