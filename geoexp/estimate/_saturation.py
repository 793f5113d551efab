"""Direct, spillover and total effects by saturation level (two-stage designs)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from geoexp.errors import InputError


def saturation_effects(
    y: np.ndarray, treated: np.ndarray, level: np.ndarray, saturations: np.ndarray
) -> pd.DataFrame:
    """Group-mean contrasts of a randomized-saturation design, one row per positive saturation.

    Hudgens & Halloran (2008); Baird, Bohren, McIntosh & Özler (2018). For
    saturation s: direct = ybar(treated; s) - ybar(untreated; s), spillover =
    ybar(untreated; s) - ybar(units of clusters at saturation 0), total =
    ybar(treated; s) - ybar(saturation 0) = direct + spillover (exactly).

    Parameters
    ----------
    y
        Outcome per unit (units in the design's clusters).
    treated
        Whether each unit was treated.
    level
        Index into ``saturations`` of each unit's cluster's drawn level.
    saturations
        The design's saturation levels; one must be 0 (pure-control clusters).

    Returns
    -------
    pandas.DataFrame
        Indexed by saturation (share of a cluster's units treated, 0 to 1):
        ``n_treated``, ``n_untreated``, ``n_pure_control_clusters_units`` and
        the ``direct``, ``spillover`` and ``total`` effects in the unit of ``y``
        (NaN where a group is empty).

    Raises
    ------
    geoexp.errors.InputError
        No saturation is 0, or no cluster drew saturation 0.
    """
    y = np.asarray(y, dtype=float)
    treated = np.asarray(treated, dtype=bool)
    level = np.asarray(level)
    saturations = np.asarray(saturations, dtype=float)
    zero = np.flatnonzero(saturations == 0)
    if zero.size == 0:
        raise InputError(
            "spillover by saturation needs clusters at saturation 0 (pure-control clusters)"
        )
    control = np.isin(level, zero)
    if not control.any():
        raise InputError("no cluster drew saturation 0 in this assignment")
    y0 = y[control].mean()
    rows = []
    for idx, s in enumerate(saturations):
        if s == 0:
            continue
        here = level == idx
        t, u = here & treated, here & ~treated
        yt = y[t].mean() if t.any() else np.nan
        yu = y[u].mean() if u.any() else np.nan
        rows.append(
            {
                "saturation": s,
                "n_treated": int(t.sum()),
                "n_untreated": int(u.sum()),
                "n_pure_control_clusters_units": int(control.sum()),
                "direct": yt - yu,
                "spillover": yu - y0,
                "total": yt - y0,
            }
        )
    return pd.DataFrame(rows).set_index("saturation")
