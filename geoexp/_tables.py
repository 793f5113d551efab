"""Tables for reports: numbers formatted one way, as HTML or as Markdown."""

from __future__ import annotations

import numpy as np
import pandas as pd


def format_number(v: object) -> str:
    """Whole numbers without decimals, others with three; missing values as a dash."""
    if isinstance(v, (float, np.floating)):
        if not np.isfinite(v):
            return "—"
        return f"{v:,.0f}" if float(v).is_integer() else f"{v:.3f}"
    return str(v)


def html_table(frame: pd.DataFrame) -> str:
    """An HTML table (class ``t``) with numbers formatted by :func:`format_number`."""
    return frame.to_html(float_format=format_number, border=0, classes="t", na_rep="—")


def markdown_table(frame: pd.DataFrame) -> str:
    """A GitHub-style Markdown table; a MultiIndex is joined with " / "."""
    names = [n or "" for n in frame.index.names]
    cols = [" / ".join(names)] + [str(c) for c in frame.columns]
    lines = ["| " + " | ".join(cols) + " |", "|" + "---|" * len(cols)]
    for idx, row in frame.iterrows():
        label = " / ".join(map(str, idx)) if isinstance(idx, tuple) else str(idx)
        lines.append("| " + " | ".join([label, *(format_number(v) for v in row)]) + " |")
    return "\n".join(lines)
