"""The geoexp command line: thin commands over the library's public functions."""

from geoexp.cli._app import app, main

__all__ = ["app", "main"]
