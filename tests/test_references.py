"""The project names its own sources: no file of the repository points outside it."""

from __future__ import annotations

from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
# spelled in pieces so that this file does not match itself
FORBIDDEN = ("../" + "shared", "CHECKS" + ".md")
SKIP_DIRS = {".git", "__pycache__", ".ruff_cache", ".pytest_cache", ".hypothesis", "build", "dist"}
TEXT_SUFFIXES = {".py", ".md", ".toml", ".txt", ".cfg", ".ini", ".yml", ".yaml", ".ipynb", ".html"}
TEXT_SUFFIXES |= {".json", ".geojson", ".csv", ".rst", ".sh", ".in"}


def _text_files(root: Path):
    for path in root.rglob("*"):
        if any(part in SKIP_DIRS or part.endswith(".egg-info") for part in path.parts):
            continue
        if path.is_file() and (path.suffix.lower() in TEXT_SUFFIXES or path.name == "LICENSE"):
            yield path


def _pointers_outside(root: Path) -> list[str]:
    found = []
    for path in _text_files(root):
        text = path.read_text(encoding="utf-8", errors="replace")
        for number, line in enumerate(text.splitlines(), start=1):
            if any(word in line for word in FORBIDDEN):
                found.append(f"{path.relative_to(root)}:{number}: {line.strip()}")
    return found


def test_the_search_finds_a_pointer_when_there_is_one(tmp_path):
    (tmp_path / "notes.md").write_text("see " + FORBIDDEN[1] + "\n", encoding="utf-8")
    (tmp_path / "a.py").write_text("# " + FORBIDDEN[0] + "/x\n", encoding="utf-8")
    assert len(_pointers_outside(tmp_path)) == 2


def test_no_file_points_outside_the_repository():
    assert (ROOT / "docs" / "references.md").is_file()
    assert sum(1 for _ in _text_files(ROOT)) > 50  # the walk really reads the repository
    found = _pointers_outside(ROOT)
    assert not found, "files point outside the repository:\n" + "\n".join(found)
