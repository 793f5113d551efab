"""Tables for people: headers in words, numbers formatted one way, as text, HTML or Markdown.

Frames keep their machine names (``std_error``, ``units_possible``); only what
is printed for a reader says them in words (:func:`header_words`), with
thousands separators on every count (:func:`format_number`) and plurals that
agree with their number (:func:`plural`).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

# Machine names whose words are not simply the name with spaces.
_WORDS = {
    "std_error": "Standard error",
    "mc_error": "Monte Carlo error",
    "ci": "Confidence interval",
    "ci_low": "Interval low",
    "ci_high": "Interval high",
    "ci_by_test_inversion": "Interval by test inversion",
    "p_no_effect (± MC error)": "p, no effect (± Monte Carlo error)",
    "p_no_spillover (± MC error)": "p, no spillover (± Monte Carlo error)",
    "p_value": "p-value",
    "n_units": "Units",
    "n_draws": "Draws",
    "units_in_estimand": "Units in the estimand",
    "expected_units": "Expected units",
    "expected_eligible": "Expected eligible units",
    "units_possible": "Units that can be in it",
    "mean_over_draws": "Mean over draws",
    "low_2.5%": "Low (2.5%)",
    "high_97.5%": "High (97.5%)",
    "p05": "5th percentile",
    "p95": "95th percentile",
    "min": "Minimum",
    "max": "Maximum",
    "wdq": "Weighted displacement quotient",
    "buffer": "Spillover band",
    "buffer_before": "Band, before",
    "buffer_after": "Band, after",
    "buffer_measure": "Band measure",
    "target_before": "Treated, before",
    "target_after": "Treated, after",
    "control_before": "Control, before",
    "control_after": "Control, after",
}


def header_words(name: object) -> str:
    """A column or index name as a reader's heading: ``units_possible`` -> ``Units that can be in it``."""
    text = str(name)
    if text in _WORDS:
        return _WORDS[text]
    text = text.replace("_", " ").strip()
    return text[:1].upper() + text[1:]


def plural(n: int, word: str, words: str | None = None) -> str:
    """``1 district``, ``2 districts``, ``12,000 units``: the number with separators, the word agreeing."""
    return f"{n:,} {word if n == 1 else (words or word + 's')}"


def format_number(v: object, digits: int = 3) -> str:
    """Whole numbers with thousands separators, others with ``digits`` decimals; missing as a dash."""
    if isinstance(v, (bool, np.bool_)):
        return str(v)
    if isinstance(v, (int, np.integer)):
        return f"{int(v):,}"
    if isinstance(v, (float, np.floating)):
        if not np.isfinite(v):
            return "—"
        return f"{v:,.0f}" if float(v).is_integer() else f"{v:,.{digits}f}"
    return str(v)


def readable_frame(frame: pd.DataFrame, digits: int = 3) -> pd.DataFrame:
    """The frame as text for a reader: headers in words, numbers by :func:`format_number`.

    Row labels are left as they are (they are units, conditions or the user's
    own column names); so is every level of a column MultiIndex but the last
    (e.g. the names of designs compared).
    """
    out = frame.apply(lambda col: _column_text(col, digits))
    columns = frame.columns
    names = [None if n is None else header_words(n) for n in columns.names]
    if isinstance(columns, pd.MultiIndex):
        out.columns = pd.MultiIndex.from_tuples(
            [(*t[:-1], header_words(t[-1])) for t in columns], names=names
        )
    else:
        out.columns = pd.Index([header_words(c) for c in columns], name=names[0])
    out.index = frame.index.set_names(
        [None if n is None else header_words(n) for n in frame.index.names]
    )
    return out


def _column_text(col: pd.Series, digits: int) -> pd.Series:
    # one format per column: a column of fractions keeps its decimals on whole values too
    values = pd.to_numeric(col, errors="coerce") if col.dtype.kind == "f" else None
    if values is not None:
        finite = values[np.isfinite(values)]
        if len(finite) and not (finite == np.round(finite)).all():
            return col.map(lambda v: f"{v:,.{digits}f}" if np.isfinite(v) else "—")
    return col.map(lambda v: format_number(v, digits))


def text_table(frame: pd.DataFrame, digits: int = 3) -> str:
    """A plain-text table for the terminal: headers in words, counts with thousands separators."""
    return readable_frame(frame, digits).to_string()


def html_table(frame: pd.DataFrame) -> str:
    """An HTML table (class ``t``), headers in words, numbers formatted by :func:`format_number`."""
    return readable_frame(frame).to_html(border=0, classes="t", na_rep="—")


def markdown_table(frame: pd.DataFrame) -> str:
    """A GitHub-style Markdown table, headers in words; a MultiIndex is joined with " / "."""
    names = [header_words(n) if n else "" for n in frame.index.names]
    cols = [" / ".join(names)] + [header_words(c) for c in frame.columns]
    lines = ["| " + " | ".join(cols) + " |", "|" + "---|" * len(cols)]
    for idx, row in frame.iterrows():
        label = " / ".join(map(str, idx)) if isinstance(idx, tuple) else str(idx)
        lines.append("| " + " | ".join([label, *(format_number(v) for v in row)]) + " |")
    return "\n".join(lines)
