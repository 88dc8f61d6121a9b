"""Outcome families: each is the whole plug-in of an outcome type (see `Family`).

Adding a family: one module with a `Family` subclass and one line in `REGISTRY` (``_registry.py``).
``FAMILY_NAMES`` loads nothing; the rest loads on first use (the kernels and their compiled loops take
seconds to import, which the command line's help should not pay).
"""

from importlib import import_module

from ._registry import FAMILY_NAMES, REGISTRY

_LAZY = {
    "CONDITIONING": "._base",
    "Family": "._base",
    "PrePass": "._base",
    "permuted_copies": "._base",
    "ArrayWhere": "._response",
    "Response": "._response",
    "TableWhere": "._response",
    "Where": "._response",
    "CoxFamily": "._glm",
    "LogisticFamily": "._glm",
    "PoissonFamily": "._glm",
    "LinearFamily": "._linear",
    "DistanceCorrelationFamily": "._modelfree",
    "HolpFamily": "._modelfree",
    "RankFamily": "._modelfree",
    "RankUtilityFamily": "._modelfree",
    "SplineFamily": "._modelfree",
}

_families: dict | None = None


def __getattr__(name: str):
    if name == "FAMILIES":
        return _registry()
    if name in _LAZY:
        value = getattr(import_module(_LAZY[name], __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def _registry() -> dict:
    global _families
    if _families is None:
        from ._registry import load_families

        _families = load_families()
    return _families


def get_family(name: str):
    """The family registered under ``name``; a clear error listing the known ones otherwise."""
    if name not in REGISTRY:
        raise ValueError(f"unknown family {name!r}; choose one of: {', '.join(FAMILY_NAMES)}")
    return _registry()[name]


def describe_families() -> str:
    """One line per registered family ("name: description"), for help texts and documentation."""
    return "\n".join(f"{name}: {f.description}" for name, f in _registry().items())


__all__ = [
    "CONDITIONING",
    "FAMILIES",
    "FAMILY_NAMES",
    "REGISTRY",
    "ArrayWhere",
    "CoxFamily",
    "DistanceCorrelationFamily",
    "Family",
    "HolpFamily",
    "LinearFamily",
    "LogisticFamily",
    "PoissonFamily",
    "PrePass",
    "RankFamily",
    "RankUtilityFamily",
    "Response",
    "SplineFamily",
    "TableWhere",
    "Where",
    "describe_families",
    "get_family",
    "permuted_copies",
]
