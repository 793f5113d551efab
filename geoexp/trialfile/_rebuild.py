"""A trial's design rebuilt from its trial file, with the stored assignment."""

from __future__ import annotations

import os

import numpy as np

from geoexp.design import Assignment, Design
from geoexp.errors import DesignError
from geoexp.trialfile._file import TrialFile
from geoexp.units import UnitSet

__all__ = ["design_from_trial"]


def design_from_trial(trial: TrialFile | str | os.PathLike[str]) -> tuple[Design, Assignment]:
    """Rebuild a trial's design from its trial file, with its stored assignment.

    The units, their eligibility and the spec come from the file itself, so
    the analysis does not depend on the original layer still being around.
    The spec's seed is drawn again and must give the stored assignment;
    if it does not, the file was altered or the environment differs, and
    the analysis refuses rather than use probabilities of another design.
    (:func:`geoexp.trialfile.verify_trial` checks the rest of the record.)

    Parameters
    ----------
    trial : TrialFile or path
        A trial GeoPackage holding a drawn assignment.

    Returns
    -------
    (Design, Assignment)
    """
    tf = trial if isinstance(trial, TrialFile) else TrialFile.open(trial)
    if not tf.is_locked:
        raise DesignError(f"trial file {str(tf.path)!r} holds no drawn assignment yet")
    frame = tf.units()
    eligible = frame["eligible"].astype(bool).to_numpy()
    units = UnitSet.from_frame(
        frame.drop(columns=["eligible"]), None, source=f"{tf.path} (units layer)"
    )
    design = Design.from_spec(tf.spec(), units=units, eligible=eligible)
    # only the treated column is compared: reading the layer's geometry would be most of the read
    stored = tf.read_columns("assignment", ["treated"]).reindex(units.ids)
    treated = stored["treated"].astype(bool).to_numpy()
    again = design.draw()
    if not np.array_equal(again.treated, treated):
        raise DesignError(
            f"the assignment stored in {str(tf.path)!r} is not the one its spec and seed "
            f"draw ({int((again.treated != treated).sum())} units differ). The file may have "
            "been edited by hand; geoexp will not analyse it with another design's probabilities."
        )
    assignment = Assignment(
        ids=units.ids,
        treated=treated,
        conditions=again.conditions,
        eligible=eligible,
        mapping=design.mapping,
        spec_hash=design.spec.hash,
        seed=design.spec.seed,
        drawn_at=tf.meta.get("drawn_at", ""),
        extra=again.extra,
    )
    return design, assignment
