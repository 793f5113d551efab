"""What the committed calibration measured about the printed intervals, in words for the report.

The numbers come from ``calibration.json`` beside this module, written by
``benchmarks/calibration.py --coverage-file`` (simulated trials on the invented
sample city, with the geoexp commit and date they were measured at). The report
quotes no coverage figure that is not in that file.
"""

from __future__ import annotations

import datetime as dt
import json
import re
from functools import lru_cache
from importlib import resources
from typing import Literal

# Coverage below this share of trials is read as "too narrow" (the project's target for
# every printed 95% interval, a few Monte Carlo standard errors under 95%).
TARGET_COVERAGE = 0.93

RowKind = Literal["direct", "spillover"]


@lru_cache(maxsize=1)
def calibration_summary() -> dict:
    """The committed calibration summary (``calibration.json``), or ``{}`` when absent.

    Returns
    -------
    dict
        ``measured`` (date), ``geoexp_commit``, ``table`` (the file under
        benchmarks/results), ``designs``, ``trials_with_intervals``,
        ``draws_per_test``, ``level`` and ``coverage``: per ``"<row kind>, <interval>"``
        the lowest and highest share of trials whose interval held the planted value,
        with the Monte Carlo standard error of the lowest.
    """
    try:
        text = resources.files("geoexp.report").joinpath("calibration.json").read_text("utf-8")
    except FileNotFoundError:
        return {}
    return json.loads(text)


def _date(iso: str) -> str:
    """``2026-12-03`` as ``3 December 2026`` (no hyphen for a printed line to break at)."""
    day = dt.date.fromisoformat(iso)
    return f"{day.day} {day:%B %Y}"


def interval_caveat(kind: RowKind, summary: dict | None = None) -> str:
    """One sentence on how often the printed intervals of a row kind covered in simulations.

    Parameters
    ----------
    kind : {"direct", "spillover"}
        The treated row, or the spillover bands' rows.
    summary : dict, optional
        A calibration summary (default: the committed one).

    Returns
    -------
    str
        The coverage range measured for the additive and rate-ratio intervals of
        that kind of row, with the trials, designs, commit and date behind it,
        and, when the lowest is below :data:`TARGET_COVERAGE`, the reading that
        the intervals are somewhat too narrow, naming the interval, row, design
        and scenario of the lowest; empty when nothing was measured.
    """
    summary = calibration_summary() if summary is None else summary
    found = {k: v for k, v in summary.get("coverage", {}).items() if k.startswith(f"{kind}, ")}
    if not found:
        return ""
    low_key = min(found, key=lambda k: found[k]["lowest"])
    low = found[low_key]
    high = max(c["highest"] for c in found.values())
    level = int(round(100 * summary.get("level", 0.95)))
    rows = "the treated row" if kind == "direct" else "spillover rows"
    text = (
        f"in at least {summary['trials_with_intervals']} simulated trials per design on an invented "
        "city "
        f"({', '.join(summary['designs'])} designs; geoexp {summary['geoexp_commit']}, "
        f"measured {_date(summary['measured'])}), {level}% intervals of {rows} (additive and rate "
        f"ratio) held the planted value in {100 * low['lowest']:.1f}% "
        f"(± {100 * low['lowest_mc_se']:.1f}, one Monte Carlo standard error) to "
        f"{100 * high:.1f}% of trials"
    )
    if low["lowest"] < TARGET_COVERAGE:
        text += ": read them as somewhat too narrow"
        if low.get("lowest_at"):
            text += f" (lowest: {_where(low_key.split(', ', 1)[1], low['lowest_at'])})"
    return text


_SCENARIOS = {"null": "no effect", "additive": "additive effects", "rate ratio": "rate ratios"}


def _where(interval: str, at: str) -> str:
    """Where the lowest coverage was, in words for a table cell (no hyphen to break a line at).

    ``"rate ratio"`` and ``"saturation, null, spillover 0-150 m"`` read "the rate
    ratio interval of the spillover 0 to 150 m row, saturation design, under no effect".
    """
    design, scenario, row = (part.strip() for part in at.split(",", 2))
    row = re.sub(r"(\d)-(\d)", r"\1 to \2", row)
    return (
        f"the {interval} interval of the {row} row, {design} design, under "
        f"{_SCENARIOS.get(scenario, scenario)}"
    )
