"""The trial file: one GeoPackage holding everything about a trial.

Layers: ``units`` (the unit layer with eligibility), ``assignment`` (drawn
treatment, exposure condition and probabilities per unit, with geometry so
a desktop GIS can show it), ``probabilities``, ``superseded_assignments``
(every assignment ever replaced, never lost), ``trial_meta`` (the spec as
TOML, its hash, the seed, the lock) and later ``outcomes`` and ``results``.
Every write goes to a temporary copy that is renamed over the file, so a crash
never leaves a half-written trial. A trial whose assignment is drawn is locked:
drawing again raises :class:`~geoexp.errors.LockedTrialError` unless the caller
asks to replace it.
"""

from geoexp.trialfile._file import TrialFile, export_assignment_csv, write_trial

__all__ = ["TrialFile", "export_assignment_csv", "write_trial"]
