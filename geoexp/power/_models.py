"""Outcome models for power simulations: what each unit's outcome would be under each condition."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import TYPE_CHECKING, Literal

import numpy as np

from geoexp.errors import InputError, describe_rows

if TYPE_CHECKING:
    from geoexp.design import Design
    from geoexp.exposure import ExposureMapping

OutcomeMeasure = Literal["change", "post"]


def _frozen_effects(effects: Mapping[str, float], what: str) -> Mapping[str, float]:
    if not isinstance(effects, Mapping):
        raise InputError(
            f"{what} must map condition names to numbers, got {type(effects).__name__}"
        )
    out = {}
    for key, value in effects.items():
        try:
            number = float(value)
        except (TypeError, ValueError):
            raise InputError(f"{what}[{key!r}] must be a number, got {value!r}") from None
        if not np.isfinite(number):
            raise InputError(f"{what}[{key!r}] must be finite, got {value!r}")
        out[str(key) if not isinstance(key, (int, np.integer)) else int(key)] = number
    return MappingProxyType(out)


def _frozen_array(values, what: str) -> np.ndarray:
    array = np.array(values, dtype=float)  # a copy: the caller's array is never shared
    if array.ndim != 1:
        raise InputError(f"{what} must be one value per unit (1-d), got shape {array.shape}")
    bad = np.flatnonzero(~np.isfinite(array) | (array < 0))
    if bad.size:
        raise InputError(
            f"{what} must be finite and non-negative; offending positions: {describe_rows(bad)}"
        )
    array.flags.writeable = False
    return array


def _per_unit(value, design: Design, what: str, *, smooth: bool) -> np.ndarray:
    """A per-unit array of a model parameter given as a number, a column name or an array."""
    n = design.units.n
    if isinstance(value, str):
        frame = design.units.frame
        if value not in frame.columns:
            raise InputError(
                f"{what} column {value!r} is not in {design.units.source!r}; its columns are "
                f"{[c for c in frame.columns if c != 'geometry']}"
            )
        column = frame[value]
        try:
            raw = column.to_numpy(dtype=float, na_value=np.nan)
        except (TypeError, ValueError):
            raise InputError(
                f"{what} column {value!r} of {design.units.source!r} is not numeric"
            ) from None
        bad = np.flatnonzero(~np.isfinite(raw) | (smooth & (raw < 0)))
        if bad.size:
            raise InputError(
                f"{what} column {value!r} of {design.units.source!r} is empty, infinite or "
                f"negative for {bad.size} units: {describe_rows(design.units.ids[bad])}"
            )
        if smooth:
            # a unit with no incidents last year is not certain to have none: shrink halfway
            # toward the layer's mean count, so rates stay positive and ranks are kept
            raw = (raw + raw.mean()) / 2
        return raw
    array = np.asarray(value, dtype=float)
    if array.ndim == 0:
        return np.full(n, float(array))
    if array.shape != (n,):
        raise InputError(
            f"{what} must give one value per unit of the layer ({n}), got {array.shape}"
        )
    return array


def _describe_change(value: float, kind: Literal["ratio", "shift"]) -> str:
    if kind == "ratio":
        if np.isclose(value, 1.0):
            return "no change"
        word = "reduction" if value < 1 else "increase"
        return f"a {abs(1 - value) * 100:.3g}% {word}"
    if np.isclose(value, 0.0):
        return "no change"
    return f"a shift of {value:+.3g}"


@dataclass(frozen=True, eq=False)
class NegativeBinomialOutcome:
    """Counts per unit and period: negative binomial (NB2) around a baseline, times a rate ratio.

    A unit with expected count mu in the pre-period has, in the post-period,
    expected count ``mu * rate_ratios[c]`` when it is in condition ``c``
    (conditions not named keep ratio 1). Counts are NB2: Var = m + alpha m^2
    (the Poisson–gamma mixture; ``dispersion=0`` is Poisson), drawn as
    ``rng.negative_binomial(n=1/alpha, p=1/(1+alpha*m))``, the law of
    ``scipy.stats.nbinom(n=1/alpha, p=1/(1+alpha*m))`` whose mean is m
    (Cameron & Trivedi 1986 call this parameterisation NB2).

    Parameters
    ----------
    baseline
        Expected counts per unit (one per unit of the layer), or the name of a
        column of past counts. A column is smoothed to ``(count + mean) / 2``,
        with the mean over every unit of the layer, so that a unit with no
        incidents last year is not a certain zero.
    dispersion
        alpha >= 0 of NB2.
    rate_ratios
        Condition code (``"treated"``, ``"spillover_1"``, ...) or label ->
        multiplier on the expected count; 0.8 is a 20% reduction.
    """

    baseline: str | np.ndarray
    dispersion: float = 0.5
    rate_ratios: Mapping[str, float] = field(default_factory=dict)

    def __post_init__(self) -> None:
        alpha = float(self.dispersion)
        if not np.isfinite(alpha) or alpha < 0:
            raise InputError(f"dispersion must be a finite number >= 0, got {self.dispersion!r}")
        object.__setattr__(self, "dispersion", alpha)
        ratios = _frozen_effects(self.rate_ratios, "rate_ratios")
        bad = [k for k, v in ratios.items() if v <= 0]
        if bad:
            raise InputError(f"rate ratios must be positive; offending conditions: {bad}")
        object.__setattr__(self, "rate_ratios", ratios)
        if not isinstance(self.baseline, str):
            object.__setattr__(self, "baseline", _frozen_array(self.baseline, "baseline"))

    def unit_means(self, design: Design) -> np.ndarray:
        """Expected pre-period count of every unit of the design's layer."""
        return _per_unit(self.baseline, design, "baseline", smooth=isinstance(self.baseline, str))

    def effects(self, mapping: ExposureMapping) -> np.ndarray:
        """Multiplier on the expected count in each condition (by code)."""
        out = np.ones(mapping.n_conditions)
        for key, value in self.rate_ratios.items():
            out[mapping.code(key)] = value
        return out

    def expected(self, means: np.ndarray, effects: np.ndarray, codes: np.ndarray) -> np.ndarray:
        """Expected post-period outcome of units with ``means`` in conditions ``codes``."""
        return means * effects[codes]

    def sample(self, expected: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        """Counts with the given expectations (any shape), NB2 with this dispersion."""
        expected = np.asarray(expected, dtype=float)
        if self.dispersion == 0:
            return rng.poisson(expected).astype(float)
        size = 1.0 / self.dispersion
        return rng.negative_binomial(size, 1.0 / (1.0 + self.dispersion * expected)).astype(float)

    def describe(self, effects: np.ndarray, k: int, l: int) -> str:
        """Plain words for the planted effect of condition ``k`` against ``l``."""
        return _describe_change(effects[k] / effects[l], "ratio")


@dataclass(frozen=True, eq=False)
class NormalOutcome:
    """A continuous outcome: normal around a per-unit mean, plus an additive shift per condition.

    Parameters
    ----------
    mean
        Mean per unit in the pre-period: a number, an array (one per unit) or a column name.
    sd
        Standard deviation of each period's outcome around its mean.
    shifts
        Condition code or label -> additive shift in the post-period
        (conditions not named: 0).
    """

    mean: float | str | np.ndarray = 0.0
    sd: float = 1.0
    shifts: Mapping[str, float] = field(default_factory=dict)

    def __post_init__(self) -> None:
        sd = float(self.sd)
        if not np.isfinite(sd) or sd < 0:
            raise InputError(f"sd must be a finite number >= 0, got {self.sd!r}")
        object.__setattr__(self, "sd", sd)
        object.__setattr__(self, "shifts", _frozen_effects(self.shifts, "shifts"))
        if not isinstance(self.mean, (str, int, float, np.number)):
            mean = np.array(self.mean, dtype=float)
            if mean.ndim != 1 or not np.isfinite(mean).all():
                raise InputError("mean must be a number, a column name or finite values per unit")
            mean.flags.writeable = False
            object.__setattr__(self, "mean", mean)

    def unit_means(self, design: Design) -> np.ndarray:
        """Pre-period mean of every unit of the design's layer."""
        return _per_unit(self.mean, design, "mean", smooth=False)

    def effects(self, mapping: ExposureMapping) -> np.ndarray:
        """Additive shift in each condition (by code)."""
        out = np.zeros(mapping.n_conditions)
        for key, value in self.shifts.items():
            out[mapping.code(key)] = value
        return out

    def expected(self, means: np.ndarray, effects: np.ndarray, codes: np.ndarray) -> np.ndarray:
        """Expected post-period outcome of units with ``means`` in conditions ``codes``."""
        return means + effects[codes]

    def sample(self, expected: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        """Normal outcomes with the given expectations (any shape) and this sd."""
        expected = np.asarray(expected, dtype=float)
        # standard noise first, so that the same rng gives the same noise whatever the effects
        return expected + self.sd * rng.standard_normal(expected.shape)

    def describe(self, effects: np.ndarray, k: int, l: int) -> str:
        """Plain words for the planted effect of condition ``k`` against ``l``."""
        return _describe_change(effects[k] - effects[l], "shift")


OutcomeModel = NegativeBinomialOutcome | NormalOutcome
