"""Outcome families: each supplies a screening kernel, a refit loss and a conditioning rule."""

from ._base import Family, Response
from ._glm import CoxFamily, LogisticFamily, PoissonFamily
from ._linear import LinearFamily
from ._modelfree import (
    DistanceCorrelationFamily,
    HolpFamily,
    RankFamily,
    RankUtilityFamily,
    SplineFamily,
)

#: The registry: the names users give to ``--family``.
FAMILIES: dict[str, Family] = {
    f.name: f
    for f in (
        LinearFamily(),
        LogisticFamily(),
        PoissonFamily(),
        CoxFamily(),
        RankFamily(),
        RankUtilityFamily(),
        DistanceCorrelationFamily(),
        SplineFamily(),
        HolpFamily(),
    )
}


def get_family(name: str) -> Family:
    """The family registered under ``name``; a clear error listing the known ones otherwise."""
    try:
        return FAMILIES[name]
    except KeyError:
        raise ValueError(f"unknown family {name!r}; choose one of: {', '.join(FAMILIES)}") from None


__all__ = [
    "FAMILIES",
    "CoxFamily",
    "DistanceCorrelationFamily",
    "Family",
    "HolpFamily",
    "LinearFamily",
    "LogisticFamily",
    "PoissonFamily",
    "RankFamily",
    "RankUtilityFamily",
    "Response",
    "SplineFamily",
    "get_family",
]
