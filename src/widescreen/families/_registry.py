"""The registry of families: one line per family, readable without importing any kernel.

The command line lists the names in its help from here (importing the families themselves loads the
kernels and the compiled loops, seconds the help should not cost).
"""

from __future__ import annotations

from importlib import import_module

#: ``--family`` name -> "module:class" of its `Family` subclass. Adding a family: one line here.
REGISTRY: dict[str, str] = {
    "linear": "._linear:LinearFamily",
    "logistic": "._glm:LogisticFamily",
    "poisson": "._glm:PoissonFamily",
    "cox": "._glm:CoxFamily",
    "rank": "._modelfree:RankFamily",
    "rank-utility": "._modelfree:RankUtilityFamily",
    "dcor": "._modelfree:DistanceCorrelationFamily",
    "spline": "._modelfree:SplineFamily",
    "holp": "._modelfree:HolpFamily",
}

#: The names users give to ``--family``, in the registry's order.
FAMILY_NAMES: tuple[str, ...] = tuple(REGISTRY)


def load_families() -> dict:
    """Name -> an instance of every registered family (imports their modules)."""
    out = {}
    for name, where in REGISTRY.items():
        module, cls = where.split(":")
        family = getattr(import_module(module, __package__), cls)()
        if family.name != name:
            raise RuntimeError(
                f"the registry names {where} {name!r}, the class says {family.name!r}"
            )
        out[name] = family
    return out


__all__ = ["FAMILY_NAMES", "REGISTRY", "load_families"]
