"""Checks of option values, so that a bad value is refused before any work starts."""

from __future__ import annotations

import math
from enum import StrEnum

import typer

MAX_DRAWS = 1_000_000  # Monte Carlo draws: beyond this a run takes hours on a laptop


class OutcomeChoice(StrEnum):
    """What is analysed per unit."""

    change = "change"
    post = "post"


class OverTimeChoice(StrEnum):
    """The periods of the report's section "Over time"."""

    month = "month"
    week = "week"


class EstimatorChoice(StrEnum):
    """The estimator of each contrast."""

    hajek = "hajek"
    horvitz_thompson = "horvitz-thompson"


def _number(value: float, name: str) -> float:
    if value is None:
        return value
    if not math.isfinite(value):
        raise typer.BadParameter(f"{name} must be a finite number, got {value!r}")
    return value


def open_share(value: float | None) -> float | None:
    """A probability strictly between 0 and 1 (a confidence level, a significance level)."""
    if value is None:
        return value
    _number(value, "the value")
    if not 0 < value < 1:
        raise typer.BadParameter(f"must lie strictly between 0 and 1, e.g. 0.95; got {value!r}")
    return value


def closed_share(value: float | None) -> float | None:
    """A share from 0 to 1, both included."""
    if value is None:
        return value
    _number(value, "the value")
    if not 0 <= value <= 1:
        raise typer.BadParameter(f"must be a share from 0 to 1, e.g. 0.8; got {value!r}")
    return value


def positive_metres(value: float | None) -> float | None:
    """A distance in metres, finite and above zero."""
    if value is None:
        return value
    _number(value, "a distance")
    if not value > 0:
        raise typer.BadParameter(f"must be a positive number of metres, got {value!r}")
    return value


def non_negative(value: float | None) -> float | None:
    """A finite number at or above zero."""
    if value is None:
        return value
    _number(value, "the value")
    if value < 0:
        raise typer.BadParameter(f"must be a number >= 0, got {value!r}")
    return value
