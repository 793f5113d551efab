"""Docstrings of the public names follow the numpydoc standard (checked with numpydoc.validate).

The public names are those each package lists in ``__all__``. The checks are
numpydoc's own validator (numpydoc project, ``numpydoc.validate``); the codes
below are its error codes.
"""

from __future__ import annotations

import importlib
import inspect
import pkgutil

import pytest
from numpydoc.validate import validate

import geoexp

# Every public name: a docstring (GL08), no documented parameter that does not exist (PR02),
# every documented parameter with a type (PR04 aside, see below) and a description (PR07),
# a one-line summary that starts with a capital letter and ends with a period (SS01-SS03),
# no blank line right after the opening quotes (GL01 is numpydoc's wording choice: skipped).
ALWAYS = {"GL08", "PR02", "PR03", "PR06", "PR07", "SS01", "SS02", "SS03", "GL03"}
# Public functions also document every parameter (PR01) and what they return (RT01).
FUNCTIONS = {"PR01", "RT01"}

# Public functions whose Parameters or Returns sections are still being written. The list
# only shrinks: a name that passes must leave it, and no name may join it.
INCOMPLETE: set[str] = set()


def public_names() -> list[tuple[str, object]]:
    """(dotted name, object) of every class and function a package lists in ``__all__``."""
    out = []
    for info in pkgutil.iter_modules(geoexp.__path__):
        if info.name.startswith("_"):
            continue
        module = importlib.import_module(f"geoexp.{info.name}")
        for name in getattr(module, "__all__", ()):
            obj = getattr(module, name)
            if inspect.isclass(obj) or inspect.isfunction(obj):
                out.append((f"geoexp.{info.name}.{name}", obj))
    return out


PUBLIC = public_names()


def errors_of(name: str, obj: object) -> set[str]:
    codes = set(ALWAYS)
    if inspect.isfunction(obj):
        codes |= FUNCTIONS
    return {f"{code}: {message}" for code, message in validate(name)["errors"] if code in codes}


def test_there_are_public_names_to_check():
    assert len(PUBLIC) > 100


@pytest.mark.parametrize(("name", "obj"), PUBLIC, ids=[n for n, _ in PUBLIC])
def test_public_docstring(name, obj):
    found = errors_of(name, obj)
    if name in INCOMPLETE:
        assert found, f"{name} now passes: remove it from INCOMPLETE"
        found = {e for e in found if not e.startswith(("PR01", "RT01"))}
    assert found == set()


def test_incomplete_names_exist():
    assert INCOMPLETE <= {n for n, _ in PUBLIC}


def test_validator_catches_an_undocumented_parameter():
    # Source: numpydoc.validate reports PR01 for a parameter the docstring omits.
    def sample(a, b):
        """Add two numbers.

        Parameters
        ----------
        a : int
            First.

        Returns
        -------
        int
            The sum.
        """
        return a + b

    import sys

    module = sys.modules[__name__]
    module.sample = sample
    try:
        codes = {code for code, _ in validate(f"{__name__}.sample")["errors"]}
    finally:
        del module.sample
    assert "PR01" in codes and "RT01" not in codes
