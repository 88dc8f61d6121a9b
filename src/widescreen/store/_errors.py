"""The store's error types (apart, so `_location` and `_format` both use them)."""


class StoreError(ValueError):
    """A dataset store is missing, incomplete, of an unknown version or damaged."""


class ChunkError(StoreError):
    """A chunk file of X is missing, truncated, moved or cannot be decoded."""
