"""Outcome families: each supplies a screening kernel, a refit loss and a conditioning rule."""

from ._base import Family, Response
from ._linear import LinearFamily

#: The registry: the names users give to ``--family``.
FAMILIES: dict[str, Family] = {
    LinearFamily.name: LinearFamily(),
}


def get_family(name: str) -> Family:
    """The family registered under ``name``; a clear error listing the known ones otherwise."""
    try:
        return FAMILIES[name]
    except KeyError:
        raise ValueError(f"unknown family {name!r}; choose one of: {', '.join(FAMILIES)}") from None


__all__ = ["FAMILIES", "Family", "LinearFamily", "Response", "get_family"]
