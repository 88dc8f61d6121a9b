"""The ``widescreen`` command line."""

from . import (  # noqa: F401  (each module registers its commands)
    _demo,
    _report,
    _run,
    _screen,
    _store,
)
from ._app import app, main

__all__ = ["app", "main"]
