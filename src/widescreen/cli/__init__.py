"""The ``widescreen`` command line."""

from . import (
    _report,  # noqa: F401  (registers the report command)
    _run,  # noqa: F401  (registers the run command)
)
from ._app import app, main

__all__ = ["app", "main"]
