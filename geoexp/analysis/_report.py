"""The analysis report: HTML with plots embedded, and a Markdown twin."""

from __future__ import annotations

import base64
import html
import io
import os
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from geoexp._atomic import atomic_path
from geoexp._tables import html_table, markdown_table
from geoexp.cautions import CAUTION

if TYPE_CHECKING:
    from geoexp.analysis._run import Analysis
    from geoexp.trialfile import TrialFile


RESULT_MAP_TITLE = "Result map: observed change per unit by condition"


def _relative_link(target: str | Path, report: Path) -> str:
    """Link from the report to ``target``: relative when both share a drive, else a file URI."""
    target = Path(target)
    try:
        return Path(os.path.relpath(target.resolve(), report.resolve().parent)).as_posix()
    except ValueError:  # different drives on Windows
        return target.resolve().as_uri()


def distance_decay_plot(analysis: Analysis, ax=None):
    """Spillover estimate with its interval for each distance band (and the direct effect).

    Returns the matplotlib Axes.
    """
    if ax is None:
        import matplotlib.pyplot as plt  # interactive use only; reports draw on plain Figures

        _, ax = plt.subplots(figsize=(6.4, 3.6))
    scale = 1.0 if analysis.distance_unit == "m" else 1 / 0.3048
    edges = (0.0, *(e * scale for e in analysis.band_edges))
    mids = [(a + b) / 2 for a, b in zip(edges[:-1], edges[1:], strict=True)]
    # the intervals printed beside the verdicts (test inversion), else the approximation
    bounds = [
        (v.ci_low, v.ci_high) if np.isfinite([v.ci_low, v.ci_high]).all() else (e.ci_low, e.ci_high)
        for e, v in zip(analysis.effects, analysis.verdicts, strict=True)
    ]
    spill = analysis.effects[1:]
    est = np.array([e.estimate for e in spill])
    lo = np.array([b[0] for b in bounds[1:]])
    hi = np.array([b[1] for b in bounds[1:]])
    ax.axhline(0, color="0.4", lw=1, ls="--")
    ax.errorbar(
        mids,
        est,
        yerr=[est - lo, hi - est],
        fmt="o-",
        color="#0072B2",
        capsize=4,
        label="spillover vs pure control",
    )
    for a, b in zip(edges[:-1], edges[1:], strict=True):
        ax.axvspan(a, b, color="0.93" if (a // 1) % 2 == 0 else "0.97", zorder=0)
    d = analysis.effects[0]
    ax.errorbar(
        [0],
        [d.estimate],
        yerr=[[d.estimate - bounds[0][0]], [bounds[0][1] - d.estimate]],
        fmt="s",
        color="#D55E00",
        capsize=4,
        label="treated vs pure control",
    )
    ax.set_xlabel(f"distance to the nearest treated unit ({analysis.distance_unit})")
    ax.set_ylabel("effect (incidents per unit)")
    ax.set_title("Effect by distance from treated units")
    ax.legend(loc="best", fontsize=8)
    return ax


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=130, bbox_inches="tight")
    return buf.getvalue()


def _p(test) -> str:
    return f"{test.p_value:.4f} ± {test.mc_error:.4f}"


def _summary(analysis: Analysis) -> pd.DataFrame:
    rows = []
    for i, e in enumerate(analysis.effects):
        s = analysis.spillover_tests[i]
        rows.append(
            {
                "contrast": e.contrast,
                "estimate": e.estimate,
                "std_error": e.std_error,
                "ci_by_test_inversion": f"{analysis.intervals[i][0]:+.2f} to {analysis.intervals[i][1]:+.2f}",
                "p (the interval's test)": f"{analysis.verdicts[i].p_value:.4f}",
                "approximate ci (normal; can miscover in small trials)": (
                    f"{e.ci_low:+.2f} to {e.ci_high:+.2f}"
                    if i < len(analysis.rows) and analysis.rows[i].show_approximation
                    else "—"
                ),
                "p_no_effect (± MC error)": _p(analysis.fisher[i]) if analysis.fisher[i] else "—",
                "p_no_spillover (± MC error)": _p(s) if s else "—",
                "units_in_estimand": e.n_units,
                "exposed": e.n_exposure,
                "reference": e.n_reference,
                "excluded": e.n_excluded,
                "finding": analysis.verdicts[i].finding,
            }
        )
    return pd.DataFrame(rows).set_index("contrast")


def write_report(
    analysis: Analysis,
    path: str | Path,
    *,
    trial: TrialFile | None = None,
    extra_figures: dict[str, Callable] | None = None,
    result_map_html: str | Path | None = None,
    static_map: bool = True,
) -> tuple[Path, Path]:
    """Write the report as HTML (plots embedded) and a Markdown twin beside it.

    ``extra_figures`` maps a title to a function ``f(ax)`` that draws on an Axes.
    When ``trial`` is given (and ``static_map`` is true) the report also embeds
    the static result map of :func:`geoexp.maps.result_map_static`.
    ``result_map_html`` is the path of the interactive result map (from
    :func:`geoexp.maps.result_map`), linked from both reports. Returns
    (html_path, markdown_path).
    """
    path = Path(path)
    md_path = path.with_suffix(".md")
    figures: dict[str, bytes] = {}
    fig = Figure(figsize=(6.4, 3.6))
    ax = fig.subplots()
    distance_decay_plot(analysis, ax=ax)
    figures["Effect by distance"] = _png(fig)
    if trial is not None and static_map and RESULT_MAP_TITLE not in (extra_figures or {}):
        from geoexp.maps import result_map_static

        fig = Figure(figsize=(8.3, 8.3))
        ax = fig.subplots()
        result_map_static(analysis, trial, ax=ax)
        figures[RESULT_MAP_TITLE] = _png(fig)
    link = _relative_link(result_map_html, path) if result_map_html is not None else None
    for title, draw in (extra_figures or {}).items():
        fig = Figure(figsize=(7, 7))
        ax = fig.subplots()
        draw(ax)
        figures[title] = _png(fig)
    summary = _summary(analysis)
    wdq = (
        pd.concat([d.to_frame() for d in analysis.displacement])
        if analysis.displacement
        else pd.DataFrame()
    )
    meta = trial.meta if trial is not None else {}
    design_rows = {
        "trial": analysis.name,
        "design hash": analysis.spec_hash,
        "seed": meta.get("seed", ""),
        "assignment drawn": meta.get("drawn_at", ""),
        "outcome": analysis.outcome_words,
        "estimator": f"{analysis.estimator} (Horvitz–Thompson twin in the results layer)",
        "probability draws": str(analysis.n_draws_probabilities),
        "test draws": str(analysis.n_draws_tests),
        "distances": "metres" if analysis.distance_unit == "m" else "feet (international)",
    }
    css = (
        "body{font-family:sans-serif;max-width:60em;margin:2em auto;line-height:1.45;color:#222}"
        "table.t{border-collapse:collapse;font-size:.9em}table.t td,table.t th{padding:.25em .6em;"
        "border-bottom:1px solid #ccc;text-align:right}table.t{display:block;overflow-x:auto}.caution{border-left:4px solid #D55E00;"
        "padding:.5em 1em;background:#fff7f0}img{max-width:100%}"
    )
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>{html.escape(analysis.name)} — results</title><style>{css}</style></head><body>",
        f"<h1>{html.escape(analysis.name)}: results</h1>",
        f"<p class='caution'>{html.escape(CAUTION)}</p>",
        "<h2>Findings</h2><ul>",
        *(f"<li>{html.escape(v.sentence)}</li>" for v in analysis.verdicts),
        "</ul>",
        *(
            [
                f"<p>Interactive result map: <a href='{html.escape(link)}'>"
                f"{html.escape(Path(link).name)}</a> (opens in a browser, works offline).</p>"
            ]
            if link
            else []
        ),
        "<p>Effects are in incidents per unit; a reduction is negative, and more incidents "
        "next to treated units (displacement) is positive. Rejecting “no effect at all” is not "
        "evidence of spillover; the spillover verdicts rest on the conditional test of no "
        "spillover, which is exact but uses only the focal units that are never treated. The "
        "interval by test inversion uses every unit in the band under a constant-effect model, "
        "and the conservative interval uses the Aronow–Samii variance bound, so the three can "
        "disagree near the edge of significance.</p>",
        "<h2>Design</h2>",
        html_table(pd.DataFrame({"value": design_rows})),
        "<h2>Estimates</h2>",
        html_table(summary),
        *(
            [
                "<h2>Effects by saturation (randomized-saturation design)</h2>",
                "<p>Group means by the saturation each unit's cluster drew (Hudgens &amp; "
                "Halloran 2008; Baird, Bohren, McIntosh &amp; Özler 2018): total = direct + "
                "spillover.</p>",
                html_table(analysis.saturation),
            ]
            if analysis.saturation is not None
            else []
        ),
        "<h2>Displacement or diffusion: weighted displacement quotient</h2>",
        "<p>Bowers &amp; Johnson (2003): treated units as target area, each band as buffer, "
        "pure controls as control area.</p>",
        html_table(wdq) if len(wdq) else "<p>Not computable.</p>",
    ]
    for title, png in figures.items():
        b64 = base64.b64encode(png).decode("ascii")
        parts.append(
            f"<h2>{html.escape(title)}</h2><img alt='{html.escape(title)}' "
            f"src='data:image/png;base64,{b64}'>"
        )
    parts += [
        "<h2>What was excluded and why</h2><ul>",
        *(f"<li>{html.escape(n)}</li>" for n in analysis.notes),
        "<li>Each contrast covers only the units that could be in both of its conditions "
        "under the design (positivity); counts are in the estimates table.</li></ul>",
        "<h2>Methods</h2><p>Horvitz–Thompson and Hajek estimators of exposure contrasts with the "
        "conservative variance of Aronow &amp; Samii (2017), using exposure and joint "
        "probabilities from draws of the design's own sampler; Fisher randomization tests of "
        "no effect at all; conditional randomization tests of no spillover on focal units that "
        "are never treated (Athey, Eckles &amp; Imbens 2018); intervals for a constant "
        "additive effect by test inversion; the weighted displacement quotient of Bowers "
        "&amp; Johnson (2003).</p>",
        "</body></html>",
    ]
    with atomic_path(path) as tmp:
        tmp.write_text("\n".join(parts), encoding="utf-8")
    md = [
        f"# {analysis.name}: results",
        "",
        f"> {CAUTION}",
        "",
        "## Findings",
        "",
        *(f"- {v.sentence}" for v in analysis.verdicts),
        "",
        *([f"Interactive result map: [{Path(link).name}]({link})", ""] if link else []),
        "## Design",
        "",
        *(f"- {k}: {v}" for k, v in design_rows.items()),
        "",
        "## Estimates",
        "",
        markdown_table(summary),
        "",
        *(
            ["## Effects by saturation", "", markdown_table(analysis.saturation), ""]
            if analysis.saturation is not None
            else []
        ),
        "## Weighted displacement quotient (Bowers & Johnson 2003)",
        "",
        markdown_table(wdq) if len(wdq) else "Not computable.",
        "",
    ]
    for i, (title, png) in enumerate(figures.items()):
        img = md_path.with_name(f"{md_path.stem}_figure{i + 1}.png")
        with atomic_path(img) as tmp:
            tmp.write_bytes(png)
        md += [f"## {title}", "", f"![{title}]({img.name})", ""]
    md += ["## What was excluded and why", "", *(f"- {n}" for n in analysis.notes), ""]
    with atomic_path(md_path) as tmp:
        tmp.write_text("\n".join(md), encoding="utf-8")
    return path, md_path
