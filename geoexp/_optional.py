"""Import optional heavy dependencies with a message naming the extra to install."""

from __future__ import annotations

import importlib
from types import ModuleType

from geoexp.errors import MissingPackageError


def import_optional(module: str, extra: str, purpose: str) -> ModuleType:
    """Import ``module`` or raise MissingPackageError (an ImportError) naming the extra to install."""
    try:
        return importlib.import_module(module)
    except ImportError as err:
        raise MissingPackageError(
            f"{purpose} needs the Python package '{module.split('.')[0]}'. "
            f"Install it with: pip install 'geoexp[{extra}]'"
        ) from err
