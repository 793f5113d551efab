"""Import optional heavy dependencies with a message naming the extra to install."""

from __future__ import annotations

import importlib
from types import ModuleType


def import_optional(module: str, extra: str, purpose: str) -> ModuleType:
    """Import ``module`` or raise ImportError saying which extra provides it."""
    try:
        return importlib.import_module(module)
    except ImportError as err:
        raise ImportError(
            f"{purpose} needs the Python package '{module.split('.')[0]}'. "
            f"Install it with: pip install 'geoexp[{extra}]'"
        ) from err
