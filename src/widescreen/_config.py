"""Validation of configuration values, shared by every config dataclass's ``__post_init__``.

A bad value raises `ConfigError` (a ValueError) naming the field and what it must be, in one line:
"The 'alpha' must be a number in (0, 1); got 2.0." The command line maps the field to its option.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from numbers import Integral, Real
from typing import Any


class ConfigError(ValueError):
    """A configuration value is not allowed.

    Attributes
    ----------
    field : str
        The configuration field (the command line maps it to its option).
    requirement : str
        What the value must be ("a positive integer").
    value : object
        The value given.
    """

    def __init__(
        self, field: str, requirement: str, value: Any, message: str | None = None
    ) -> None:
        self.field, self.requirement, self.value = field, requirement, value
        super().__init__(message or f"The {field!r} must be {requirement}; got {value!r}.")


def check_int(field: str, value: Any, minimum: int = 0, *, optional: bool = False) -> None:
    """An integer (not a bool) of at least ``minimum``."""
    if optional and value is None:
        return
    if isinstance(value, bool) or not isinstance(value, Integral) or value < minimum:
        what = {0: "a non-negative integer", 1: "a positive integer"}.get(
            minimum, f"an integer of at least {minimum}"
        )
        raise ConfigError(field, what + (" or None" if optional else ""), value)


def check_number(
    field: str,
    value: Any,
    low: float,
    high: float,
    *,
    open_low: bool = False,
    open_high: bool = False,
    optional: bool = False,
) -> None:
    """A finite number in the interval [low, high] (ends open as asked)."""
    if optional and value is None:
        return
    ok = isinstance(value, Real) and not isinstance(value, bool) and math.isfinite(value)
    if ok:
        ok = (value > low if open_low else value >= low) and (
            value < high if open_high else value <= high
        )
    if not ok:
        if math.isfinite(high):
            lo, hi = "(" if open_low else "[", ")" if open_high else "]"
            raise ConfigError(field, f"a number in {lo}{low:g}, {high:g}{hi}", value)
        raise ConfigError(field, f"a number {'>' if open_low else '>='} {low:g}", value)


def check_choice(field: str, value: Any, choices: Iterable[str]) -> None:
    choices = tuple(choices)
    if value not in choices:
        raise ConfigError(field, f"one of {', '.join(map(repr, choices))}", value)


def check_text(field: str, value: Any, *, optional: bool = False) -> None:
    """A non-empty string."""
    if optional and value is None:
        return
    if not isinstance(value, str) or not value.strip():
        raise ConfigError(field, "a non-empty text" + (" or None" if optional else ""), value)


def check_names(field: str, value: Any) -> tuple[str, ...]:
    """A tuple of distinct non-empty strings (a list is taken as a tuple)."""
    if isinstance(value, str) or not isinstance(value, Iterable):
        raise ConfigError(field, "a sequence of names", value)
    names = tuple(value)
    if not all(isinstance(v, str) and v.strip() for v in names) or len(set(names)) < len(names):
        raise ConfigError(field, "distinct non-empty names", value)
    return names


def check_keep(field: str, value: Any) -> None:
    """A positive integer or "auto"."""
    if value == "auto":
        return
    if isinstance(value, bool) or not isinstance(value, Integral) or value < 1:
        raise ConfigError(field, "a positive integer or 'auto'", value)


__all__ = [
    "ConfigError",
    "check_choice",
    "check_int",
    "check_keep",
    "check_names",
    "check_number",
    "check_text",
]
