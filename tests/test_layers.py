"""The package's layers: imports run only downwards, packages form no cycle, privates stay private.

The import graph is read from the source with :mod:`ast` (imports at module
level and inside functions alike, ``TYPE_CHECKING`` blocks included), so it
does not depend on what happens to be imported at run time.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1] / "geoexp"

# Bottom to top. A package may import packages of its own layer or of lower layers only.
LAYERS: list[set[str]] = [
    {
        "errors",
        "_rng",
        "_atomic",
        "_optional",
        "cautions",
        "_tables",
        "_engine",
        "_paths",
        "_significance",
        "_progress",
    },
    # core helpers
    {"sampleregion"},  # invented data for the demo and benchmarks; no library code depends on it
    {"postgis"},  # reading and writing database tables; knows nothing of trials
    {"units"},
    {"graph", "_moran"},  # Moran's I over the graph: below the design check that reports it
    {"exposure"},
    {"design"},
    {"estimate", "inference"},
    {"power", "outcomes", "trialfile"},
    {"delivery"},  # presence at units from visit logs and GPS pings; the delivery monitor
    {"analysis"},
    {"sweep"},  # design sweeps over the power simulation, here or on a Dask cluster
    {"maps", "briefing", "report"},  # the output layer
    {"workflow", "publish"},  # count, analyse and report as one job; tables to a database
    {"quickstart"},  # the demo job
    {"cli"},
]

# Violations being removed in other parts of the code base at the moment; each is allowed
# here until its removal is merged, then deleted from this list. The checks still fail on
# any violation not listed. (importer module, imported module): reason.
KNOWN_VIOLATIONS: dict[tuple[str, str], str] = {}


# ----------------------------------------------------------------------------- the checker


def module_name(path: Path, root: Path) -> str:
    """Dotted module name of a source file under ``root`` (the ``geoexp`` folder)."""
    parts = list(path.relative_to(root.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def import_graph(root: Path) -> dict[str, set[str]]:
    """For each module of the package at ``root``, the modules of that package it imports."""
    files = {module_name(p, root): p for p in root.rglob("*.py")}
    modules = set(files)
    graph: dict[str, set[str]] = {}
    for name, path in files.items():
        is_package = path.name == "__init__.py"
        found: set[str] = set()
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"), str(path))):
            if isinstance(node, ast.Import):
                targets = [alias.name for alias in node.names]
            elif isinstance(node, ast.ImportFrom):
                if node.level:
                    base = name.split(".")
                    base = base if is_package else base[:-1]
                    base = base[: len(base) - (node.level - 1)]
                    stem = ".".join(base + ([node.module] if node.module else []))
                else:
                    stem = node.module or ""
                # "from a import b" imports module a.b when there is one, else names of a.
                targets = [
                    f"{stem}.{alias.name}" if f"{stem}.{alias.name}" in modules else stem
                    for alias in node.names
                ]
            else:
                continue
            for target in targets:
                # "import a.b.c" names the deepest module that exists.
                while target and target not in modules:
                    target = target.rpartition(".")[0]
                if target and target != name:
                    found.add(target)
        graph[name] = found
    return graph


def package_of(module: str) -> str | None:
    """The top-level part of ``geoexp`` a module belongs to (None for the root face)."""
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else None


def is_private_module(module: str) -> bool:
    """True for a private module inside a package (``geoexp.pkg._mod``)."""
    return any(part.startswith("_") for part in module.split(".")[2:])


def layer_violations(graph: dict[str, set[str]], layers: list[set[str]]) -> set[tuple[str, str]]:
    """Imports from a lower layer to a higher one, and of modules whose layer is unknown."""
    rank = {pkg: i for i, layer in enumerate(layers) for pkg in layer}
    bad = set()
    for source, targets in graph.items():
        src = package_of(source)
        if src is None:
            continue
        for target in targets:
            dst = package_of(target)
            if dst is None or dst == src:
                continue
            if src not in rank or dst not in rank or rank[dst] > rank[src]:
                bad.add((source, target))
    return bad


def private_violations(graph: dict[str, set[str]]) -> set[tuple[str, str]]:
    """Imports of another package's private module."""
    return {
        (source, target)
        for source, targets in graph.items()
        for target in targets
        if package_of(target) != package_of(source) and is_private_module(target)
    }


def package_cycles(
    graph: dict[str, set[str]], ignore: set[tuple[str, str]] = frozenset()
) -> list[list[str]]:
    """Cycles between packages (each as a list of package names), by depth-first search."""
    edges: dict[str, set[str]] = {}
    for source, targets in graph.items():
        for target in targets:
            a, b = package_of(source), package_of(target)
            if a and b and a != b and (source, target) not in ignore:
                edges.setdefault(a, set()).add(b)
    cycles, state = [], {}

    def visit(node: str, path: list[str]) -> None:
        state[node] = "open"
        path.append(node)
        for nxt in sorted(edges.get(node, ())):
            if state.get(nxt) == "open":
                cycles.append(path[path.index(nxt) :] + [nxt])
            elif nxt not in state:
                visit(nxt, path)
        path.pop()
        state[node] = "done"

    for node in sorted(edges):
        if node not in state:
            visit(node, [])
    return cycles


# ------------------------------------------------------------------ tests of the checker


def _write(root: Path, files: dict[str, str]) -> Path:
    for rel, text in files.items():
        path = root / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text, encoding="utf-8")
    return root


@pytest.fixture
def fake(tmp_path):
    """A tiny package ``geoexp`` with a low package, a high package and a helper."""
    return _write(
        tmp_path / "geoexp",
        {
            "__init__.py": "",
            "errors.py": "",
            "low/__init__.py": "from geoexp.low._core import f\n",
            "low/_core.py": "from geoexp import errors\n",
            "high/__init__.py": "from .face import g\n",
            "high/face.py": "from geoexp.low import f\n\ndef g():\n    from ..errors import X\n",
        },
    )


FAKE_LAYERS = [{"errors"}, {"low"}, {"high"}]


def test_checker_reads_every_kind_of_import(fake):
    graph = import_graph(fake)
    assert graph["geoexp.low"] == {"geoexp.low._core"}
    assert graph["geoexp.low._core"] == {"geoexp.errors"}
    assert graph["geoexp.high"] == {"geoexp.high.face"}
    # absolute, and relative inside a function
    assert graph["geoexp.high.face"] == {"geoexp.low", "geoexp.errors"}
    assert layer_violations(graph, FAKE_LAYERS) == set()
    assert private_violations(graph) == set()
    assert package_cycles(graph) == []


def test_checker_finds_an_upward_import_inside_a_function(fake):
    _write(fake, {"low/_core.py": "def f():\n    import geoexp.high.face\n"})
    graph = import_graph(fake)
    assert layer_violations(graph, FAKE_LAYERS) == {("geoexp.low._core", "geoexp.high.face")}
    assert package_cycles(graph) == [["high", "low", "high"]]


def test_checker_finds_a_private_import_and_an_unplaced_package(fake):
    _write(fake, {"high/face.py": "from geoexp.low._core import f\n", "odd/__init__.py": ""})
    _write(fake, {"odd/__init__.py": "from geoexp import errors\n"})
    graph = import_graph(fake)
    assert private_violations(graph) == {("geoexp.high.face", "geoexp.low._core")}
    assert layer_violations(graph, FAKE_LAYERS) == {("geoexp.odd", "geoexp.errors")}


# ------------------------------------------------------------------ the real package


@pytest.fixture(scope="module")
def graph():
    return import_graph(ROOT)


def test_every_package_has_a_layer(graph):
    placed = set().union(*LAYERS)
    packages = {package_of(m) for m in graph} - {None}
    assert packages <= placed, sorted(packages - placed)


def test_no_import_runs_up_the_layers(graph):
    found = layer_violations(graph, LAYERS) - set(KNOWN_VIOLATIONS)
    assert found == set(), sorted(found)


def test_no_import_of_another_package_private_module(graph):
    found = private_violations(graph) - set(KNOWN_VIOLATIONS)
    assert found == set(), sorted(found)


def test_no_cycle_between_packages(graph):
    assert package_cycles(graph, ignore=set(KNOWN_VIOLATIONS)) == []


def test_known_violations_are_still_there(graph):
    # A listed violation that has gone must leave the list, so the list cannot hide a new one.
    edges = {(s, t) for s, targets in graph.items() for t in targets}
    assert set(KNOWN_VIOLATIONS) <= edges, sorted(set(KNOWN_VIOLATIONS) - edges)


def test_known_violations_are_violations(graph):
    found = layer_violations(graph, LAYERS) | private_violations(graph)
    assert set(KNOWN_VIOLATIONS) <= found, sorted(set(KNOWN_VIOLATIONS) - found)


def test_output_layer_is_not_imported_from_below(graph):
    output = {"maps", "briefing", "report"}
    below = set().union(*LAYERS[: LAYERS.index(output)])
    found = {
        (s, t)
        for s, targets in graph.items()
        for t in targets
        if package_of(s) in below and package_of(t) in output
    }
    assert found == set(), sorted(found)


def test_library_code_does_not_special_case_the_sample_city(graph):
    # Only the demo job, the command line and the sample city itself may import it.
    users = {s for s, targets in graph.items() for t in targets if package_of(t) == "sampleregion"}
    assert {package_of(s) for s in users} <= {"sampleregion", "quickstart", "cli"}, sorted(users)


# ------------------------------------------------------------------- size of a source file

MAX_CODE_LINES = 600  # common practice: a module a reader can hold in mind


def code_lines(source: str) -> int:
    """Non-blank lines of ``source`` that are neither comments nor docstrings."""
    tree = ast.parse(source)
    docstring_lines: set[int] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Module | ast.ClassDef | ast.FunctionDef | ast.AsyncFunctionDef):
            first = node.body[0] if node.body else None
            if (
                isinstance(first, ast.Expr)
                and isinstance(first.value, ast.Constant)
                and isinstance(first.value.value, str)
            ):
                docstring_lines.update(range(first.lineno, (first.end_lineno or first.lineno) + 1))
    return sum(
        1
        for number, line in enumerate(source.splitlines(), start=1)
        if line.strip() and not line.strip().startswith("#") and number not in docstring_lines
    )


def test_code_line_counter_skips_docstrings_and_comments():
    source = (
        '"""Module\n\ndoc."""\n\n# a comment\nx = 1\n\n\ndef f():\n    """Doc."""\n    return x\n'
    )
    # Counted by hand: "x = 1", "def f():", "return x".
    assert code_lines(source) == 3


def test_no_source_file_is_too_long():
    long = {
        str(path.relative_to(ROOT.parent)): n
        for path in ROOT.rglob("*.py")
        if (n := code_lines(path.read_text(encoding="utf-8"))) > MAX_CODE_LINES
    }
    assert long == {}, f"split these modules by concept (code lines): {long}"
