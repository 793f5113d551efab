"""The geoexp command line: thin commands over the library's public functions."""

import geoexp.cli._baseline_commands  # noqa: F401  (register the baseline command)
from geoexp.cli import _briefing_commands, _map_commands, _power_commands  # noqa: F401  (register commands)
from geoexp.cli._app import app, main

__all__ = ["app", "main"]
