"""Result maps (static and interactive) and their place in the analysis report.

The reference for every count and value is the trial file itself, read with
pandas (its ``assignment`` and ``outcomes`` layers), not the analysis object
the maps are drawn from.
"""

from __future__ import annotations

import base64
import dataclasses
import html
import io
import json
import re

import matplotlib
import numpy as np
import pytest
import shapely

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402

from geoexp.errors import InputError  # noqa: E402
from geoexp.maps import (  # noqa: E402
    change_limit,  # noqa: E402
    map_html,
    result_map,
    result_map_static,
    save_result_map,
)


@pytest.fixture(scope="module")
def analysis(trial):
    from geoexp.analysis import analyse

    return analyse(trial, n_draws=100, intervals=False)


@pytest.fixture(scope="module")
def counts(trial):
    """Units per condition, from the trial file's assignment layer."""
    return trial.assignment()["condition"].value_counts().to_dict()


@pytest.fixture(scope="module")
def observed_change(trial):
    """post - pre per unit, from the trial file's outcomes layer."""
    outcomes = trial.read("outcomes")
    return (outcomes["post"] - outcomes["pre"]).astype(float)


@pytest.fixture(scope="module")
def page(analysis, trial):
    text, remote = map_html(result_map(analysis, trial))
    return text


def _embedded(page: str) -> tuple[dict, dict, dict]:
    """The page's layer declarations, unit data and result values, parsed back as JSON."""
    cfg = json.loads(re.search(r"var cfg = (\{.*?\});\n", page).group(1))
    datasets = json.loads(re.search(r"var datasets = (\{.*?\});\n", page).group(1))
    values = json.loads(
        re.search(
            r'<script type="application/json" id="geoexp-result-values">(.*?)</script>',
            page,
            re.S,
        ).group(1)
    )
    return cfg, datasets, values


# ------------------------------------------------------------ interactive


def test_layer_feature_counts_equal_counts_by_condition(page, counts):
    cfg, datasets, values = _embedded(page)
    layers = {lay["key"]: lay for lay in cfg["layers"]}
    units = datasets["units"]["compact"]
    # Conditions of the embedded units, decoded the way the page decodes them.
    embedded = np.asarray(units["cn"])[np.asarray(units["c"])]
    for code, n in counts.items():
        assert layers[f"condition:{code}"]["expected"] == n
        assert layers[f"casing:{code}"]["expected"] == n
        assert layers[f"condition:{code}"]["code"] == code
        assert int((embedded == code).sum()) == n
    condition_layers = [k for k in layers if k.startswith("condition:")]
    assert sorted(condition_layers) == sorted(f"condition:{c}" for c in counts)
    assert sum(layers[k]["expected"] for k in condition_layers) == len(units["id"])
    # One ring per band, each in its own layer.
    assert [k for k in layers if k.startswith("ring:")] == ["ring:1", "ring:2"]


def test_embedded_change_equals_post_minus_pre_of_the_outcomes_layer(page, observed_change, trial):
    _, datasets, values = _embedded(page)
    ids = datasets["units"]["compact"]["id"]
    assert values["id"] == ids  # the values line up with the geometry, unit by unit
    outcomes = trial.read("outcomes")
    outcomes.index = outcomes.index.astype(str)
    change = np.asarray(values["change"], dtype=float)
    reference = observed_change.set_axis(observed_change.index.astype(str)).reindex(ids)
    np.testing.assert_array_equal(change, reference.to_numpy())
    np.testing.assert_array_equal(values["pre"], outcomes["pre"].reindex(ids).to_numpy())
    np.testing.assert_array_equal(values["post"], outcomes["post"].reindex(ids).to_numpy())
    # The change is not trivially zero on the demo (it has a planted effect).
    assert np.abs(change).sum() > 0


def test_unit_colours_follow_the_sign_of_the_change(page):
    _, _, values = _embedded(page)
    rgb = np.array(
        [[int(h[i : i + 2], 16) for i in (1, 3, 5)] for h in values["palette"]], dtype=float
    )[values["colour"]]
    change = np.asarray(values["change"], dtype=float)
    # ColorBrewer RdBu reversed: fewer incidents blue, more red (Harrower & Brewer 2003; from memory).
    assert (rgb[change < 0, 2] > rgb[change < 0, 0]).all()
    assert (rgb[change > 0, 0] > rgb[change > 0, 2]).all()
    # Larger decreases are darker blue: lightness (R+G+B) falls with |change| among decreases.
    neg = change < 0
    order = np.argsort(change[neg])
    assert np.all(np.diff(rgb[neg].sum(axis=1)[order]) >= -1e-9)


def test_change_limit_saturates_at_the_95th_percentile():
    change = np.r_[np.arange(-20, 21, dtype=float), [np.nan]]
    limit = change_limit(change)
    # numpy's quantile is the reference for the 95th percentile of |change|.
    assert limit == np.ceil(np.quantile(np.abs(change[:-1]), 0.95))
    assert (np.abs(change[:-1]) <= limit).mean() >= 0.95
    assert change_limit(np.zeros(5)) == 1.0  # never a zero-width scale


def test_legend_has_estimates_verdicts_and_caution(page, analysis):
    from geoexp.cautions import CAUTION

    cfg, _, _ = _embedded(page)
    legend = json.loads(re.search(r"div\.innerHTML = (\".*?\");\n", page).group(1))
    for verdict in analysis.verdicts:
        assert html.escape(verdict.sentence) in legend
    for effect in analysis.effects:
        assert f"{effect.estimate:+.2f}" in legend
        assert f"{effect.ci_low:+.2f} to {effect.ci_high:+.2f}" in legend
    assert html.escape(CAUTION) in legend


def test_saved_page_is_self_contained(analysis, trial, tmp_path):
    from geoexp.maps import offline_assets_available

    path = save_result_map(analysis, trial, tmp_path / "results_map.html", tiles=None)
    text = path.read_text(encoding="utf-8")
    if offline_assets_available():
        assert not re.search(r"<script[^>]+src=[\"']https?:", text)
        assert not re.search(r"<link[^>]+href=[\"']https?:", text)
    # The sample city lies in the ocean: a plain background, as the demo asks for.
    assert "tile.openstreetmap.org" not in text


def test_refuses_an_analysis_of_another_design(analysis, trial):
    other = dataclasses.replace(analysis, spec_hash="0" * 64)
    with pytest.raises(InputError, match="design 000000000000"):
        result_map(other, trial)
    stray = analysis.per_unit.rename(index={analysis.per_unit.index[0]: "no-such-unit"})
    with pytest.raises(InputError, match="no-such-unit"):
        result_map_static(dataclasses.replace(analysis, per_unit=stray), trial)


# ------------------------------------------------------------------ static


def test_static_map_draws_one_collection_per_condition(analysis, trial, counts):
    ax = result_map_static(analysis, trial)
    fig = ax.figure
    try:
        by_gid = {c.get_gid(): c for c in ax.collections if c.get_gid()}
        units = trial.units()
        conditions = trial.assignment()["condition"].reindex(units.index)
        for code, n in counts.items():
            # Reference: the number of line parts of those units, counted by shapely.
            geoms = np.asarray(units.geometry[conditions == code].array, dtype=object)
            parts = int(shapely.get_num_geometries(geoms).sum())
            assert parts >= n
            assert len(by_gid[f"units:{code}"].get_paths()) == parts
            assert len(by_gid[f"casing:{code}"].get_paths()) == parts
        assert {"ring:1", "ring:2", "districts"} <= set(by_gid)
        # Legible in grey: no two conditions share both line width and dash pattern.
        looks = {
            (
                float(by_gid[f"units:{c}"].get_linewidth()[0]),
                str(by_gid[f"units:{c}"].get_linestyle()[0]),
            )
            for c in counts
        }
        assert len(looks) == len(counts)
        # Treated units are the thickest lines.
        widths = {c: float(by_gid[f"units:{c}"].get_linewidth()[0]) for c in counts}
        assert max(widths, key=widths.get) == "treated"
        # A colour bar, symmetric about no change.
        bars = [a for a in fig.axes if getattr(a, "_colorbar", None) is not None]
        assert len(bars) == 1
        norm = bars[0]._colorbar.norm
        assert norm.vmax > 0
        assert norm.vmin == -norm.vmax
        assert "post − pre" in bars[0]._colorbar.ax.get_ylabel()
        # Legend rows for every condition with its count, and the verdicts in the caption.
        legend = " ".join(t.get_text() for t in ax.get_legend().get_texts())
        assignment = trial.assignment()
        labels = dict(zip(assignment["condition"], assignment["condition_label"], strict=True))
        for code, n in counts.items():
            assert f"{labels[code]} ({n:,})" in legend
        caption = next(t for t in ax.texts if t.get_gid() == "verdicts").get_text()
        flat = " ".join(caption.split())
        for verdict in analysis.verdicts:
            assert " ".join(verdict.sentence.split()) in flat
        texts = {t.get_text() for t in ax.texts}
        assert "N" in texts  # north arrow
        assert any(t.endswith(" m") or t.endswith(" km") for t in texts)  # scale bar
        fig.canvas.draw()  # renders without error on Agg
    finally:
        plt.close(fig)


def test_static_map_draws_on_a_given_axes(analysis, trial):
    fig, (left, right) = plt.subplots(1, 2, figsize=(12, 6))
    try:
        out = result_map_static(analysis, trial, ax=right)
        assert out is right
        assert not left.collections
        assert any(c.get_gid() == "units:treated" for c in right.collections)
    finally:
        plt.close(fig)


# ------------------------------------------------------------------ report


def _images(text: str) -> dict[str, bytes]:
    found = re.findall(
        r"<h2>([^<]+)</h2><img alt='[^']*' src='data:image/png;base64,([^']+)'", text
    )
    return {html.unescape(title): base64.b64decode(data) for title, data in found}


def test_report_with_a_trial_embeds_the_result_map(analysis, trial, tmp_path):
    from PIL import Image

    from geoexp.report import RESULT_MAP_TITLE, write_report

    link = save_result_map(analysis, trial, tmp_path / "results_map.html")
    report, md = write_report(analysis, tmp_path / "report.html", trial=trial, result_map_html=link)
    text = report.read_text(encoding="utf-8")
    images = _images(text)
    assert RESULT_MAP_TITLE in images
    picture = np.asarray(Image.open(io.BytesIO(images[RESULT_MAP_TITLE])).convert("RGB"), float)
    assert picture.shape[0] > 500 and picture.shape[1] > 500
    assert picture.std() > 20  # not blank
    assert "href='results_map.html'" in text
    markdown = md.read_text(encoding="utf-8")
    assert "(results_map.html)" in markdown
    assert f"![{RESULT_MAP_TITLE}]" in markdown


def test_report_without_a_trial_is_as_before(analysis, tmp_path):
    from geoexp.report import RESULT_MAP_TITLE, write_report

    report, _ = write_report(analysis, tmp_path / "report.html")
    text = report.read_text(encoding="utf-8")
    assert RESULT_MAP_TITLE not in _images(text)
    assert "Effect by distance" in _images(text)
    assert "results_map.html" not in text


def test_demo_writes_the_interactive_map_beside_the_report(demo):
    assert (demo / "results_map.html").is_file()
    assert "href='results_map.html'" in (demo / "report.html").read_text(encoding="utf-8")


def test_effects_are_matched_to_conditions_by_the_rows_codes(analysis):
    # The results map pairs each effect with its row's condition code, whatever the order
    # of the per-unit table's columns or the wording of the labels.
    from geoexp.maps._result_data import contrast_codes

    assert contrast_codes(analysis) == analysis.codes
    assert analysis.codes[0] == "treated"
    shuffled = analysis.per_unit[list(reversed(analysis.per_unit.columns))]
    assert contrast_codes(dataclasses.replace(analysis, per_unit=shuffled)) == analysis.codes
    with pytest.raises(InputError, match="condition codes"):
        contrast_codes(dataclasses.replace(analysis, rows=analysis.rows[:1]))
