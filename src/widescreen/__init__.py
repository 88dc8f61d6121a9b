"""widescreen: out-of-core screening of very wide data on disk."""

__all__ = ["__version__"]


def __getattr__(name: str):
    # The version is read from the installed metadata only when asked for: importing
    # importlib.metadata costs more than the rest of `widescreen --help`.
    if name == "__version__":
        from ._version import __version__

        return __version__
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
