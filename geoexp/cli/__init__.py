"""The geoexp command line: thin commands over the library's public functions."""

from geoexp.cli import (  # noqa: F401  (register commands)
    _baseline_commands,
    _briefing_commands,
    _database_commands,
    _delivery_commands,
    _field_commands,
    _map_commands,
    _power_commands,
    _sweep_commands,
)
from geoexp.cli._app import app, main

__all__ = ["app", "main"]
