"""The report's coverage caveat quotes the committed calibration and nothing else."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd

from geoexp.report._calibration import TARGET_COVERAGE, calibration_summary, interval_caveat

RESULTS = Path(__file__).resolve().parents[1] / "benchmarks" / "results"


def test_shipped_summary_matches_the_committed_tables_it_names():
    # The shipped figures must be those of the tables benchmarks/calibration.py wrote: pool
    # each cell's coverage over the named tables (independent seeds), weighting by trials,
    # and recompute the lowest and highest of each kind of printed interval.
    summary = calibration_summary()
    assert summary, "geoexp/report/calibration.json is missing"
    tables = [
        pd.read_csv(RESULTS / name, keep_default_na=False, na_values=[""])
        for name in summary["tables"]
    ]
    table = pd.concat(tables, ignore_index=True)
    assert sorted(set(table["design"])) == summary["designs"]
    band = table["row"].str.startswith("spillover")
    for kind, rows in (("direct", table[~band]), ("spillover", table[band])):
        for name, col in (("additive", "cover_ri"), ("rate ratio", "cover_rr")):
            got = rows[rows[col].notna()]
            hits = (
                (got[col] * got["n_full_trials"])
                .groupby([got["design"], got["scenario"], got["row"]])
                .sum()
            )
            trials = got.groupby(["design", "scenario", "row"])["n_full_trials"].sum()
            pooled = hits / trials
            cell = summary["coverage"][f"{kind}, {name}"]
            assert np.isclose(cell["lowest"], pooled.min(), atol=1e-4)
            assert np.isclose(cell["highest"], pooled.max(), atol=1e-4)
            assert trials.min() == summary["trials_with_intervals"]
            # one Monte Carlo SE of a share p over n trials: sqrt(p (1 - p) / n)
            n = trials[pooled.idxmin()]
            p = cell["lowest"]
            assert np.isclose(cell["lowest_mc_se"], np.sqrt(p * (1 - p) / n), atol=2e-3)


def test_caveat_quotes_the_summary_numbers_and_reads_them_against_the_target():
    summary = calibration_summary()
    text = interval_caveat("spillover")
    cells = [v for k, v in summary["coverage"].items() if k.startswith("spillover, ")]
    low = min(c["lowest"] for c in cells)
    high = max(c["highest"] for c in cells)
    shown = re.search(r"held the planted value in ([\d.]+)% .* to ([\d.]+)% of trials", text)
    assert shown is not None, text
    assert float(shown.group(1)) == round(100 * low, 1)
    assert float(shown.group(2)) == round(100 * high, 1)
    assert summary["geoexp_commit"] in text
    year, month, day = (int(x) for x in summary["measured"].split("-"))
    assert f"measured {day} " in text and f" {year})" in text
    # printed in a table cell: no hyphen or slash for a line to break a word at
    assert "/" not in text and not re.search(r"\w-\w", text), text
    assert ("too narrow" in text) == (low < TARGET_COVERAGE)
    if low < TARGET_COVERAGE:
        # the caveat names the design where the lowest coverage was measured
        at = min(cells, key=lambda c: c["lowest"])["lowest_at"].split(", ")
        assert f"{at[0]} design" in text, text


def test_caveat_follows_the_numbers_it_is_given():
    fake = {
        "measured": "2000-01-01",
        "geoexp_commit": "abc1234",
        "designs": ["complete"],
        "trials_with_intervals": 200,
        "level": 0.95,
        "coverage": {
            "spillover, additive": {
                "lowest": 0.9,
                "lowest_mc_se": 0.021,
                "lowest_at": "saturation, null, spillover 0-150 m",
                "highest": 0.96,
            },
            "spillover, rate ratio": {"lowest": 0.94, "lowest_mc_se": 0.017, "highest": 0.97},
            "direct, additive": {"lowest": 0.95, "lowest_mc_se": 0.015, "highest": 0.96},
        },
    }
    low = interval_caveat("spillover", fake)
    assert "90.0% (± 2.1, one Monte Carlo standard error) to 97.0% of trials" in low
    assert "too narrow" in low and "abc1234" in low and "1 January 2000" in low
    # the lowest cell is named, its band without a hyphen for a printed line to break at
    assert "(lowest: the additive interval of the spillover 0 to 150 m row, " in low
    assert "saturation design, under no effect)" in low
    fine = interval_caveat("direct", fake)
    assert "95.0% (± 1.5" in fine and "too narrow" not in fine and "lowest:" not in fine
    assert interval_caveat("spillover", {}) == ""
