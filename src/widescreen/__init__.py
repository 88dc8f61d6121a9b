"""widescreen: out-of-core screening of very wide data on disk."""

from ._version import __version__

__all__ = ["__version__"]
