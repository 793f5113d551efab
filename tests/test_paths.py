"""Tests of geoexp._paths: the output guard and the translation of write failures."""

from __future__ import annotations

import errno
import os

import pytest

from geoexp._paths import check_outputs, writing
from geoexp.errors import InputError


@pytest.fixture
def trial(tmp_path):
    path = tmp_path / "trial.gpkg"
    path.write_bytes(b"locked")
    return path


def test_fresh_outputs_beside_the_inputs_pass(tmp_path, trial):
    check_outputs(
        {"--out": tmp_path / "new" / "map.html"}, {"spec": tmp_path / "s.toml"}, trial=trial
    )


@pytest.mark.parametrize("how", ["same", "relative", "symlink", "hardlink", "dotted"])
def test_every_spelling_of_the_trial_is_refused(how, tmp_path, trial, monkeypatch):
    monkeypatch.chdir(tmp_path)
    out = {
        "same": trial,
        "relative": "trial.gpkg",
        "dotted": tmp_path / "sub" / ".." / "trial.gpkg",
        "symlink": tmp_path / "link.gpkg",
        "hardlink": tmp_path / "hard.gpkg",
    }[how]
    (tmp_path / "sub").mkdir()
    if how == "symlink":
        (tmp_path / "link.gpkg").symlink_to(trial)
    if how == "hardlink":
        os.link(trial, tmp_path / "hard.gpkg")
    with pytest.raises(InputError, match="--out .* is the trial file"):
        check_outputs({"--out": out}, {}, trial=trial)


def test_an_input_a_folder_a_file_parent_and_a_repeat_are_refused(tmp_path, trial):
    spec = tmp_path / "s.toml"
    spec.write_text("x", encoding="utf-8")
    with pytest.raises(InputError, match="is the design spec"):
        check_outputs({"--csv": spec}, {"the design spec": spec})
    with pytest.raises(InputError, match="is a folder"):
        check_outputs({"--csv": tmp_path}, {})
    with pytest.raises(InputError, match="is a file, not a folder"):
        check_outputs({"--csv": spec / "deeper" / "x.csv"}, {})
    with pytest.raises(InputError, match="name the same file"):
        check_outputs({"--a": tmp_path / "o.csv", "--b": tmp_path / "x" / ".." / "o.csv"}, {})


def test_a_symlink_loop_is_not_a_crash(tmp_path):
    loop = tmp_path / "loop"
    loop.symlink_to(tmp_path / "loop")
    with pytest.raises(InputError, match="leads nowhere"):
        check_outputs({"--out": loop / "x.csv"}, {})


@pytest.mark.parametrize(
    "code,hint", [(errno.ENOSPC, "free some space"), (errno.EACCES, "may write to")]
)
def test_write_failures_name_the_file_and_the_reason(code, hint, tmp_path):
    target = tmp_path / "out.csv"
    with pytest.raises(InputError) as err, writing(target, "field list"):
        raise OSError(code, os.strerror(code))
    text = str(err.value)
    assert str(target) in text and os.strerror(code) in text and hint in text
