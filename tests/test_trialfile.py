"""The trial file: lock, replacement with a reason, records kept, fingerprints and their check."""

from __future__ import annotations

import errno
import hashlib
import json
import shutil

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely
import shapely.affinity

import geoexp
from geoexp._atomic import temporary_paths
from geoexp.analysis import analyse, save_results
from geoexp.design import Design, DesignFingerprint, DesignSpec, frame_digest
from geoexp.errors import (
    InputError,
    LockedTrialError,
    TrialBusyError,
    TrialIntegrityError,
    TrialWriteError,
)
from geoexp.outcomes import OutcomeTable, load_outcomes, save_outcomes
from geoexp.sampleregion import synthetic_grid
from geoexp.trialfile import (
    TrialFile,
    design_from_trial,
    trial_lock,
    verify_trial,
    write_trial,
)

N_UNITS = 220
PRE, POST = ("2025-01-01", "2025-12-31"), ("2026-01-01", "2026-12-31")


def write_layer(folder, *, move_unit=None, score_edit=None, note="plain"):
    """A small street grid (EPSG:32727, metres) with a used and an unused column."""
    grid = synthetic_grid(N_UNITS, spacing=100.0)
    grid["score"] = (np.arange(N_UNITS) * 7) % 11
    grid["district"] = np.where(grid["unit_id"] <= N_UNITS // 2, "north", "south")
    grid["note"] = note  # no part of the design reads it
    if move_unit is not None:
        row = grid.index[grid["unit_id"] == move_unit][0]
        grid.loc[row, "geometry"] = shapely.affinity.translate(grid.geometry[row], xoff=1.0)
    if score_edit is not None:
        unit, value = score_edit
        grid.loc[grid["unit_id"] == unit, "score"] = value
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "units.gpkg"
    grid.to_file(path, layer="units", driver="GPKG", engine="pyogrio")
    return path


def write_zone(folder, x0=420000.0, y0=7350000.0, size=150.0):
    folder.mkdir(parents=True, exist_ok=True)
    zone = gpd.GeoDataFrame(
        {"why": ["invented exclusion"]},
        geometry=[shapely.box(x0 - 10, y0 - 10, x0 + size, y0 + size)],
        crs=32727,
    )
    path = folder / "zone.geojson"
    zone.to_file(path, driver="GeoJSON", engine="pyogrio")
    return path


def spec_for(units_path, zone_path=None, **changes):
    data = {
        "name": "small trial",
        "seed": 5,
        "draws": 100,
        "units": {"path": str(units_path), "layer": "units", "id_column": "unit_id"},
        "eligible": {"top_column": "score", "top_k": 40},
        "assignment": {"method": "blocked", "block_column": "district", "block_treated": 3},
        "exposure": {"bands_m": [150.0]},
        "field": {"district_column": "district"},
    }
    if zone_path is not None:
        data["eligible"]["exclude"] = [str(zone_path)]
    for key, value in changes.items():
        data[key] = value
    return DesignSpec.from_dict(data)


def design_for(units_path, zone_path=None, **changes):
    return Design.from_spec(spec_for(units_path, zone_path, **changes))


def outcome_table(trial, seed=0):
    ids = TrialFile.open(trial).units().index
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame(
        {"pre": rng.poisson(4, len(ids)), "post": rng.poisson(4, len(ids))}, index=ids
    )
    return OutcomeTable.from_counts(
        frame, None, units=TrialFile.open(trial), pre=PRE, post=POST, source="invented counts"
    )


@pytest.fixture
def drawn(tmp_path):
    layer = write_layer(tmp_path / "data")
    zone = write_zone(tmp_path / "data")
    design = design_for(layer, zone)
    path = tmp_path / "trial.gpkg"
    write_trial(path, design, design.draw(), design.probabilities())
    return path, design


def gpkg_bytes(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


# ---- writing, locking, replacing ----------------------------------------------------


def test_write_open_and_lock(drawn):
    path, design = drawn
    tf = TrialFile.open(path)
    assert tf.is_locked and tf.draw_number == 1
    assert {"units", "assignment", "probabilities", "unit_fingerprints"} <= tf.layers
    assert tf.design_fingerprint == design.fingerprint.digest
    assert tf.meta["tool_version"] == geoexp.__version__
    before = gpkg_bytes(path)
    with pytest.raises(LockedTrialError, match="--reason"):
        write_trial(path, design, design.draw())
    assert gpkg_bytes(path) == before  # a refusal leaves every byte as it was
    assert verify_trial(path).ok


def test_replace_without_a_reason_is_refused(drawn):
    path, design = drawn
    before = gpkg_bytes(path)
    for reason in ("", "   "):
        with pytest.raises(InputError, match="needs a reason"):
            write_trial(path, design, design.draw(), replace=True, reason=reason)
    assert gpkg_bytes(path) == before


def test_redraw_keeps_outcomes_and_results(drawn):
    path, design = drawn
    table = outcome_table(path)
    save_outcomes(path, table)
    analysis = analyse(path, n_draws=100, intervals=False)
    save_results(path, analysis)
    first = TrialFile.open(path)
    stored_fp = first.meta["outcomes_fingerprint"]
    assert first.meta["results_design_fingerprint"] == first.design_fingerprint
    assert first.meta["results_outcomes_fingerprint"] == stored_fp

    other = Design.from_spec(design.spec.replace(seed=77), units=design.units)
    tf = write_trial(path, other, other.draw(), replace=True, reason="units file corrected")
    assert tf.draw_number == 2 and tf.meta["seed"] == "77"
    assert "outcomes" not in tf.layers and "results" not in tf.layers
    assert not any(k.startswith(("outcomes_", "results_")) for k in tf.meta)
    with pytest.raises(InputError, match="no outcomes yet"):
        load_outcomes(path)

    old = pyogrio.read_dataframe(path, layer="superseded_outcomes")
    assert set(old["draw_number"]) == {1}
    assert (old["outcomes_fingerprint"] == stored_fp).all()
    kept = old.set_index("unit_id")[["pre", "post"]].astype(np.int64)
    pd.testing.assert_frame_equal(
        kept.reindex(table.counts.index), table.counts[["pre", "post"]], check_names=False
    )
    res = pyogrio.read_dataframe(path, layer="superseded_results")
    assert set(res["draw_number"]) == {1} and len(res) == len(analysis.effects)
    assert (res["superseded_reason"] == "units file corrected").all()
    meta = pyogrio.read_dataframe(path, layer="superseded_meta")
    seed_row = meta[(meta["draw_number"] == 1) & (meta["key"] == "seed")]
    assert list(seed_row["value"]) == ["5"]
    assigned = pyogrio.read_dataframe(path, layer="superseded_assignments")
    assert set(assigned["draw_number"]) == {1} and len(assigned) == N_UNITS


def test_results_of_an_earlier_draw_are_refused(drawn):
    path, design = drawn
    save_outcomes(path, outcome_table(path))
    analysis = analyse(path, n_draws=100, intervals=False)
    other = Design.from_spec(design.spec.replace(seed=78), units=design.units)
    write_trial(path, other, other.draw(), replace=True, reason="redrawn meanwhile")
    with pytest.raises(TrialIntegrityError, match="analyse the trial again"):
        save_results(path, analysis)
    assert "results" not in TrialFile.open(path).layers


def test_a_write_through_an_old_snapshot_keeps_a_later_redraw(drawn):
    path, design = drawn
    snapshot = TrialFile.open(path)
    other = Design.from_spec(design.spec.replace(seed=79), units=design.units)
    write_trial(path, other, other.draw(), replace=True, reason="second draw")
    snapshot.write_layers({"field_notes": pd.DataFrame({"text": ["invented"]})}, meta={"x": "1"})
    now = TrialFile.open(path)
    assert now.draw_number == 2 and now.meta["seed"] == "79" and now.meta["x"] == "1"
    assert verify_trial(path).ok


def test_counting_again_keeps_the_earlier_outcomes(drawn):
    path, _ = drawn
    save_outcomes(path, outcome_table(path, seed=1))
    save_outcomes(path, outcome_table(path, seed=2))
    old = pyogrio.read_dataframe(path, layer="superseded_outcomes")
    assert len(old) == N_UNITS and (old["superseded_reason"] == "outcomes stored again").all()
    pd.testing.assert_frame_equal(
        load_outcomes(path).counts, outcome_table(path, seed=2).counts, check_names=False
    )


# ---- lock, stale files, failed writes ------------------------------------------------


def test_a_second_writer_waits_then_gives_up(drawn):
    path, _ = drawn
    said = []
    with trial_lock(path):
        with pytest.raises(TrialBusyError, match="still writing"):
            TrialFile.open(path).write_layers(
                {"field_notes": pd.DataFrame({"text": ["x"]})}, wait_s=0.3, notify=said.append
            )
    assert said and "waiting for another geoexp command to finish writing trial.gpkg" in said[0]
    assert "field_notes" not in TrialFile.open(path).layers


def test_stale_temporary_files_are_removed_under_the_lock(drawn):
    path, _ = drawn
    folder = path.parent
    stale = [folder / ".trial.ab12cd_3.gpkg", folder / ".trial.ab12cd_3.gpkg-journal"]
    others = [folder / ".trial.v2.ab12cd_3.gpkg", folder / ".other.ab12cd_3.gpkg"]
    for p in stale + others:
        p.write_bytes(b"half written")
    assert temporary_paths(path) == sorted(stale)
    said = []
    save_outcomes(path, outcome_table(path), notify=said.append)
    assert any("removed 2 temporary files" in s for s in said)
    assert not any(p.exists() for p in stale)
    assert all(p.exists() for p in others)  # another target's files are not ours to remove


def test_a_failed_write_names_the_file_and_leaves_it_untouched(drawn, monkeypatch):
    from geoexp.trialfile import _file

    path, _ = drawn
    before = gpkg_bytes(path)

    def full_disk(*args, **kwargs):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(_file, "_write", full_disk)
    with pytest.raises(TrialWriteError, match="could not write trial file .*trial.gpkg"):
        save_outcomes(path, outcome_table(path))
    assert gpkg_bytes(path) == before
    assert temporary_paths(path) == []


# ---- fingerprints ------------------------------------------------------------------------


def test_fingerprint_is_a_sha256_of_its_parts(drawn):
    _, design = drawn
    fp = design.fingerprint
    # the SHA-256 of FIPS 180-4 gives 64 hex digits; 12 are printed
    assert len(fp.digest) == 64 and str(fp) == fp.digest[:12]
    text = json.dumps(dict(fp.parts), sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    raw = text.encode("utf-8")
    # hashlib (an independent SHA-256) over the length-prefixed canonical JSON of the parts
    expected = hashlib.sha256(len(raw).to_bytes(8, "little") + raw).hexdigest()
    assert fp.digest == expected
    assert DesignFingerprint.from_json(fp.to_json()) == fp


def test_fingerprint_covers_what_the_design_uses(tmp_path):
    base_layer = write_layer(tmp_path / "a")
    zone = write_zone(tmp_path / "a")
    base = design_for(base_layer, zone).fingerprint

    # changes that change the design's identity
    changed = {
        "spec key": design_for(base_layer, zone, draws=200).fingerprint,
        "a unit moved by 1 m": design_for(write_layer(tmp_path / "b", move_unit=10), zone),
        "a used column edited": design_for(write_layer(tmp_path / "c", score_edit=(3, 99)), zone),
        "the zone file": design_for(base_layer, write_zone(tmp_path / "d", size=260.0)),
    }
    for what, value in changed.items():
        fp = value if isinstance(value, DesignFingerprint) else value.fingerprint
        assert fp.digest != base.digest, what

    # changes that do not: an unused column, where the files live
    same_unused = design_for(write_layer(tmp_path / "e", note="other words"), zone).fingerprint
    moved_folder = tmp_path / "elsewhere"
    moved_folder.mkdir()
    shutil.copy(base_layer, moved_folder / "units.gpkg")
    shutil.copy(zone, moved_folder / "zone.geojson")
    same_paths = design_for(moved_folder / "units.gpkg", moved_folder / "zone.geojson").fingerprint
    assert same_unused.digest == base.digest
    assert same_paths.digest == base.digest


def test_one_metre_move_is_what_the_test_says(tmp_path):
    # the moved unit is 1 m from where it was (shapely's Hausdorff distance)
    a = gpd.read_file(write_layer(tmp_path / "a")).set_index("unit_id").geometry
    b = gpd.read_file(write_layer(tmp_path / "b", move_unit=10)).set_index("unit_id").geometry
    assert shapely.hausdorff_distance(a[10], b[10]) == pytest.approx(1.0)
    assert (shapely.hausdorff_distance(a.drop(10).array, b.drop(10).array) == 0).all()


def test_fingerprint_survives_the_trial_file_round_trip(drawn, tmp_path):
    path, design = drawn
    copy = tmp_path / "other_name.gpkg"
    shutil.copy(path, copy)
    rebuilt, _ = design_from_trial(copy)
    assert rebuilt.fingerprint.digest == design.fingerprint.digest
    assert verify_trial(copy).design_fingerprint == design.fingerprint.digest
    # column digests do not depend on the storage's integer width or the frame's index
    frame = pd.DataFrame({"a": np.array([1, 2], dtype=np.int32), "b": ["x", None]})
    assert frame_digest(frame.astype({"a": np.int64})) == frame_digest(frame)


# ---- the check before analysis -------------------------------------------------------


def test_analyse_refuses_a_moved_unit(drawn):
    path, _ = drawn
    save_outcomes(path, outcome_table(path))
    tf = TrialFile.open(path)
    units = tf.units()
    units.loc[17, "geometry"] = shapely.affinity.translate(units.loc[17, "geometry"], yoff=1.0)
    tf.write_layers({"units": units})
    with pytest.raises(
        TrialIntegrityError, match=r"geometry of 1 unit in the units layer changed: 17"
    ):
        analyse(path, n_draws=50, intervals=False)


def test_analyse_refuses_an_edited_used_column(drawn):
    path, _ = drawn
    tf = TrialFile.open(path)
    save_outcomes(path, outcome_table(path))
    units = tf.units()
    units.loc[5, "district"] = "south"
    tf.write_layers({"units": units})
    with pytest.raises(TrialIntegrityError, match=r"column 'district'.*edited.*units 5"):
        analyse(path, n_draws=50, intervals=False)


def test_analyse_refuses_edited_outcomes(drawn):
    path, _ = drawn
    save_outcomes(path, outcome_table(path))
    tf = TrialFile.open(path)
    counts = tf.read("outcomes")
    counts.loc[counts.index[0], "post"] += 3
    tf.write_layers({"outcomes": counts})
    with pytest.raises(TrialIntegrityError, match="stored outcomes .* were edited"):
        analyse(path, n_draws=50, intervals=False)
    with pytest.raises(TrialIntegrityError, match="edited after they were saved"):
        load_outcomes(path)


def test_analyse_refuses_an_edited_band(drawn):
    path, _ = drawn
    save_outcomes(path, outcome_table(path))
    tf = TrialFile.open(path)
    edited = tf.meta["spec_toml"].replace("150.0", "180.0")
    assert edited != tf.meta["spec_toml"]
    tf.write_layers({}, meta={"spec_toml": edited})
    with pytest.raises(TrialIntegrityError, match=r"spec .* edited .*exposure\.bands_m"):
        analyse(path, n_draws=50, intervals=False)
    assert "results" not in TrialFile.open(path).layers


def test_a_lost_zone_file_and_a_new_version_are_notes(drawn, monkeypatch):
    path, design = drawn
    recorded = design.fingerprint.digest
    zone = design.spec.resolve(design.spec.eligible.exclude[0])
    zone.unlink()
    monkeypatch.setattr(geoexp, "__version__", "99.0")
    said = []
    found = verify_trial(path, notify=said.append)
    assert found.ok and found.design_fingerprint == recorded
    assert any("can no longer be found" in n for n in found.notes)
    assert any("geoexp 99.0" in n for n in found.notes)
    assert said == list(found.notes)


def test_a_changed_zone_file_is_named(drawn):
    path, design = drawn
    zone = design.spec.resolve(design.spec.eligible.exclude[0])
    write_zone(zone.parent, size=300.0)
    found = verify_trial(path, strict=False)
    assert not found.ok
    assert any("exclusion zone file" in p and "zone.geojson" in p for p in found.problems)


def test_removed_units_are_named(drawn):
    path, _ = drawn
    tf = TrialFile.open(path)
    units = tf.units().drop(index=[3, 4])
    tf.write_layers({"units": units})
    found = verify_trial(path, strict=False)
    assert any("unit ids" in p and "2 removed (3, 4)" in p for p in found.problems)
    with pytest.raises(TrialIntegrityError, match="unit ids of the units layer changed"):
        verify_trial(path)


def test_arrow_writes_store_what_the_row_writer_stores(tmp_path):
    # Layers of numbers, booleans, text and geometry go through Arrow; read back, they must be
    # what geopandas' own writer (GDAL feature by feature) stores, value for value.
    from geoexp.trialfile._file import _arrow_safe, _write

    frame = gpd.GeoDataFrame(
        {
            "unit_id": np.arange(5, dtype=np.int64) * 7,
            "name": pd.array(["a", "é", None, "Straße", ""], dtype="str"),
            "rate": [1.5, np.nan, 3.0, np.inf, -2.25],
            "small": np.arange(5, dtype=np.int32),
            "treated": [True, False, True, False, False],
        },
        geometry=[shapely.LineString([(i, 0.5), (i + 0.25, 1)]) for i in range(5)],
        crs="EPSG:32633",
    )
    assert _arrow_safe(frame)
    assert not _arrow_safe(frame.set_index("unit_id"))  # an index column: the row writer
    assert not _arrow_safe(frame.assign(when=pd.Timestamp("2026-01-01")))
    _write(tmp_path / "arrow.gpkg", frame, "units")
    frame.to_file(tmp_path / "rows.gpkg", layer="units", driver="GPKG", engine="pyogrio")
    a = pyogrio.read_dataframe(tmp_path / "arrow.gpkg", layer="units")
    b = pyogrio.read_dataframe(tmp_path / "rows.gpkg", layer="units")
    pd.testing.assert_frame_equal(
        pd.DataFrame(a.drop(columns="geometry")), pd.DataFrame(b.drop(columns="geometry"))
    )
    assert (a.geometry.to_wkb() == b.geometry.to_wkb()).all()
    assert a.crs == b.crs
    info = [pyogrio.read_info(tmp_path / f, layer="units") for f in ("arrow.gpkg", "rows.gpkg")]
    assert list(info[0]["dtypes"]) == list(info[1]["dtypes"])
    assert info[0]["geometry_type"] == info[1]["geometry_type"] == "LineString"


def test_shared_reads_read_a_layer_once_and_see_writes(drawn, monkeypatch):
    from geoexp.trialfile import shared_reads

    path, _ = drawn
    tf = TrialFile.open(path)
    calls = []
    real = gpd.read_file
    monkeypatch.setattr(
        gpd, "read_file", lambda *a, **k: calls.append(k.get("layer")) or real(*a, **k)
    )
    alone = tf.units()
    with shared_reads():
        first = tf.units()
        first["baseline_copy"] = 1  # a caller's change stays in its own frame
        second = TrialFile.open(path).units()
        assert calls.count("units") == 2  # once outside, once inside
        pd.testing.assert_frame_equal(pd.DataFrame(second), pd.DataFrame(alone))
        assert "baseline_copy" not in second.columns
        tf.write_layers({"notes": pd.DataFrame({"key": ["a"], "value": ["b"]})})
        TrialFile.open(path).units()  # the file was replaced: read again
        assert calls.count("units") == 3
    TrialFile.open(path).units()
    assert calls.count("units") == 4
