"""Displacement and diffusion indices of Bowers & Johnson (2003)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from geoexp.errors import InputError


@dataclass(frozen=True)
class DisplacementIndex:
    """The weighted displacement quotient and its companions for one buffer.

    Bowers & Johnson (2003), *Journal of Quantitative Criminology* 19(3): with
    target area R, buffer D and control area C, counts before (b) and after (a):
    success measure SM = R_a/C_a - R_b/C_b, buffer measure BM = D_a/C_a - D_b/C_b,
    weighted displacement quotient WDQ = BM / SM (meaningful only when SM < 0),
    total net effect TNE = [R_b C_a/C_b - R_a] + [D_b C_a/C_b - D_a] (incidents
    prevented, counting the buffer; positive is good).

    The quotient is descriptive: it has no sampling distribution of its own
    here, and a buffer's ratio moves a lot by chance when the target area's
    change is small. When ``direct_effect_clear`` is False (the randomization
    test of the treated units' change does not show a clear reduction) no
    reading is given; likewise when ``buffer_effect_clear`` is False (the
    buffer's own test shows no clear spillover: with no spillover at all the
    quotient is often far from 0). Summing several buffers' TNE counts the target area once
    per buffer: add the buffer parts to one target part instead
    (:attr:`target_part`, :attr:`buffer_part`). ``control_trend`` is C_a / C_b.
    """

    target_before: float
    target_after: float
    buffer_before: float
    buffer_after: float
    control_before: float
    control_after: float
    success_measure: float
    buffer_measure: float
    wdq: float
    total_net_effect: float
    buffer: str = "buffer"
    direct_effect_clear: bool | None = None
    buffer_effect_clear: bool | None = None
    wdq_low: float = float("nan")
    wdq_high: float = float("nan")

    @property
    def control_trend(self) -> float:
        """C_a / C_b: the control area's own change, against which both areas are read."""
        return self.control_after / self.control_before

    @property
    def target_part(self) -> float:
        """R_b C_a / C_b - R_a: incidents prevented in the target area."""
        return self.target_before * self.control_trend - self.target_after

    @property
    def buffer_part(self) -> float:
        """D_b C_a / C_b - D_a: incidents prevented in the buffer."""
        return self.buffer_before * self.control_trend - self.buffer_after

    @property
    def reading(self) -> str:
        """Plain-language reading of the quotient."""
        if self.direct_effect_clear is False:
            return (
                "not read: the change in the target area is not itself clear (its "
                "randomization test shows no clear reduction), so the quotient is descriptive only"
            )
        if self.buffer_effect_clear is False:
            return (
                "not read: the buffer's own test shows no clear spillover, and the quotient "
                "departs from 0 by chance alone, so it is descriptive only"
            )
        if self.success_measure >= 0:
            return (
                "no relative reduction in the target area (success measure >= 0), so the "
                "quotient cannot be read as displacement or diffusion"
            )
        w = self.wdq
        if w > 1:
            return "diffusion of benefits larger than the direct effect"
        if w > 0:
            return "diffusion of benefits"
        if w == 0:
            return "neither displacement nor diffusion"
        if w >= -1:
            return "some displacement, smaller than the direct gain"
        return "displacement outweighs the gain in the target area"

    def __str__(self) -> str:
        return (
            f"WDQ ({self.buffer}) = {self.wdq:+.3f}: {self.reading}; success measure "
            f"{self.success_measure:+.4f}, buffer measure {self.buffer_measure:+.4f}, total net "
            f"effect {self.total_net_effect:+.1f} incidents (target and this buffer); control "
            f"trend {self.control_trend:.3f} (after / before); "
            + (
                f"randomization interval {self.wdq_low:+.2f} to {self.wdq_high:+.2f}"
                if np.isfinite(self.wdq_low) and np.isfinite(self.wdq_high)
                else "descriptive, no interval"
            )
        )

    def to_frame(self) -> pd.DataFrame:
        """One-row frame."""
        row = dict(self.__dict__)
        row["reading"] = self.reading
        row["control_trend"] = self.control_trend
        return pd.DataFrame([row]).set_index("buffer")


def weighted_displacement_quotient(
    target_before: float,
    target_after: float,
    buffer_before: float,
    buffer_after: float,
    control_before: float,
    control_after: float,
    *,
    buffer: str = "buffer",
    direct_effect_clear: bool | None = None,
    buffer_effect_clear: bool | None = None,
) -> DisplacementIndex:
    """Compute the weighted displacement quotient of Bowers & Johnson (2003).

    Counts of incidents before and after in the target area, its buffer and a
    control area. The control counts must be positive.

    Parameters
    ----------
    target_before, target_after : float
        Incidents in the target (treated) area before and after, counts >= 0.
    buffer_before, buffer_after : float
        Incidents in the buffer around it before and after, counts >= 0.
    control_before, control_after : float
        Incidents in the control area before and after, counts > 0.
    buffer : str, default "buffer"
        Name of the buffer, carried into the result.
    direct_effect_clear : bool, optional
        Whether the randomization test shows a clear reduction in the target
        area; False withholds the reading (None: not known).
    buffer_effect_clear : bool, optional
        Whether the buffer's own test shows clear spillover; False withholds
        the reading (None: not known).

    Returns
    -------
    DisplacementIndex
        The counts, the success measure (target after/control after minus
        target before/control before), the buffer's measure likewise, the
        quotient (buffer measure over success measure; NaN when the success
        measure is 0), the total net effect in incidents, and the reading.

    Raises
    ------
    geoexp.errors.InputError
        A count is negative, or a control count is not positive.
    """
    values = [
        target_before,
        target_after,
        buffer_before,
        buffer_after,
        control_before,
        control_after,
    ]
    if any(v < 0 for v in values):
        raise InputError(f"incident counts must be non-negative, got {values}")
    if control_before <= 0 or control_after <= 0:
        raise InputError("the control area needs incidents before and after (counts > 0)")
    sm = target_after / control_after - target_before / control_before
    bm = buffer_after / control_after - buffer_before / control_before
    wdq = bm / sm if sm != 0 else float("nan")
    tne = (target_before * control_after / control_before - target_after) + (
        buffer_before * control_after / control_before - buffer_after
    )
    return DisplacementIndex(
        float(target_before),
        float(target_after),
        float(buffer_before),
        float(buffer_after),
        float(control_before),
        float(control_after),
        float(sm),
        float(bm),
        float(wdq),
        float(tne),
        buffer,
        direct_effect_clear,
        buffer_effect_clear,
    )
