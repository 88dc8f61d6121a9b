"""Response validation, written once for both routes in: an outcome table and plain arrays.

A family codes its response from raw values through a `Where`, which says where a value came from:
`TableWhere` names the outcome table, the column and the line ("o.tsv: column 'y', line 4"),
`ArrayWhere` the array and the position or sample id ("y[3]", "y, sample 's3'"). The rules (what a
count, a binary label or a survival time must be) live in the functions below and are the same for the
command line and the estimators.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..store import JoinedOutcome, OutcomeError


@dataclass(frozen=True)
class Response:
    """A validated response, aligned with the analysed samples.

    Attributes
    ----------
    y : ndarray of shape (n,)
        The response (for survival: the time).
    event : ndarray of shape (n,), optional
        Survival only: 1 for an observed event, 0 for censoring.
    mapping : dict, optional
        How text labels were coded (binary outcomes given as two labels).
    """

    y: np.ndarray
    event: np.ndarray | None = None
    mapping: dict[str, Any] = field(default_factory=dict)

    @property
    def n(self) -> int:
        return int(self.y.size)

    def subset(self, sel: np.ndarray) -> Response:
        """The response of the samples at positions ``sel``."""
        event = None if self.event is None else self.event[sel]
        return Response(y=self.y[sel], event=event, mapping=self.mapping)


class Where(ABC):
    """Where the response values came from, for error messages; roles are "response" and "event"."""

    @abstractmethod
    def raw(self, role: str) -> np.ndarray:
        """The values as given (text for a table)."""

    @abstractmethod
    def numeric(self, role: str) -> np.ndarray:
        """The values as float64; a clear error at the first one that is not a number."""

    @abstractmethod
    def column(self, role: str) -> str:
        """The column as a message names it."""

    @abstractmethod
    def at(self, role: str, i: int) -> str:
        """The value at position ``i`` as a message names it."""

    def bad(self, role: str, i: int, why: str) -> OutcomeError:
        return OutcomeError(f"{self.at(role, i)}: {str(self.raw(role)[i])!r} {why}")


@dataclass(frozen=True)
class TableWhere(Where):
    """Values of an outcome table joined to the store (``roles`` maps a role to its column name)."""

    joined: JoinedOutcome
    roles: dict[str, str]

    def raw(self, role: str) -> np.ndarray:
        return self.joined.values[self.roles[role]]

    def numeric(self, role: str) -> np.ndarray:
        return self.joined.numeric(self.roles[role])

    def column(self, role: str) -> str:
        return f"{self.joined.table.path}: column {self.roles[role]!r}"

    def at(self, role: str, i: int) -> str:
        return f"{self.column(role)}, line {self.joined.lines[i]}"


@dataclass(frozen=True)
class ArrayWhere(Where):
    """Values given as arrays (``values`` maps a role to its array), optionally with sample ids."""

    values: dict[str, np.ndarray]
    sample_ids: np.ndarray | None = None

    def raw(self, role: str) -> np.ndarray:
        return self.values[role]

    def numeric(self, role: str) -> np.ndarray:
        v = self.values[role]
        try:
            return np.asarray(v, dtype=np.float64)
        except (TypeError, ValueError):
            for i, x in enumerate(v.tolist()):
                try:
                    float(x)
                except (TypeError, ValueError):
                    raise self.bad(role, i, "is not a number") from None
            raise  # pragma: no cover - every value converted one by one

    def column(self, role: str) -> str:
        return "y" if role == "response" else role

    def at(self, role: str, i: int) -> str:
        if self.sample_ids is not None:
            return f"{self.column(role)}, sample {str(self.sample_ids[i])!r}"
        return f"{self.column(role)}[{i}]"


def quantitative(where: Where) -> Response:
    """Any finite number."""
    return Response(y=finite(where, "response"))


def finite(where: Where, role: str) -> np.ndarray:
    y = where.numeric(role)
    bad = ~np.isfinite(y)
    if bad.any():
        raise OutcomeError(f"{where.at(role, int(np.flatnonzero(bad)[0]))}: value is not finite")
    return y


def binary(where: Where) -> Response:
    """0/1 values, or exactly two labels (coded in sorted order: first -> 0, second -> 1)."""
    raw = np.asarray(where.raw("response"))
    if raw.dtype.kind == "b":
        raw = raw.astype(np.int64)
    text = raw.astype(str) if raw.dtype.kind in "OUS" else None
    if text is None:
        y = finite(where, "response")
        labels = np.unique(y)
        if set(labels.tolist()) <= {0.0, 1.0}:
            return _two_classes(where, y, {})
        # Numbers other than 0/1 are labels too (for example 1/2), coded in numeric order.
        shown = labels
    else:
        labels = np.unique(text)
        if set(labels.tolist()) <= {"0", "1", "0.0", "1.0"}:
            return _two_classes(where, text.astype(float), {})
        shown = labels
    if shown.size != 2:
        listed = ", ".join(map(repr, [str(v) for v in shown[:5].tolist()]))
        more = ", ..." if shown.size > 5 else ""
        raise OutcomeError(
            f"{where.column('response')} must hold 0/1 or two labels for a binary outcome; "
            f"found {shown.size} distinct values ({listed}{more})"
        )
    values = raw if text is None else text
    y = (values == shown[1]).astype(float)
    return _two_classes(where, y, {_label(shown[0]): 0, _label(shown[1]): 1})


def _label(v) -> str:
    """A label as the manifest records it (1.0 -> "1")."""
    if isinstance(v, float | np.floating) and float(v).is_integer():
        return str(int(v))
    return str(v)


def _two_classes(where: Where, y: np.ndarray, mapping: dict) -> Response:
    if y.min() == y.max():
        raise OutcomeError(
            f"{where.column('response')} has a single class among the analysed samples"
        )
    return Response(y=y, mapping=mapping)


def counts(where: Where) -> Response:
    """Non-negative integer counts, not all zero."""
    y = finite(where, "response")
    bad = (y < 0) | (y != np.round(y))
    if bad.any():
        raise where.bad(
            "response", int(np.flatnonzero(bad)[0]), "is not a non-negative integer count"
        )
    if y.max() == 0:
        raise OutcomeError(f"{where.column('response')} is zero for every analysed sample")
    return Response(y=y)


def survival(where: Where) -> Response:
    """Positive times and 0/1 event indicators with at least one event."""
    t = finite(where, "response")
    bad = t <= 0
    if bad.any():
        raise where.bad("response", int(np.flatnonzero(bad)[0]), "is not a positive time")
    e = finite(where, "event")
    bad = ~np.isin(e, (0.0, 1.0))
    if bad.any():
        raise where.bad(
            "event", int(np.flatnonzero(bad)[0]), "is not an event indicator (1 event, 0 censored)"
        )
    if e.sum() == 0:
        raise OutcomeError(f"{where.column('event')} has no events among the analysed samples")
    return Response(y=t, event=e)


__all__ = [
    "ArrayWhere",
    "Response",
    "TableWhere",
    "Where",
    "binary",
    "counts",
    "finite",
    "quantitative",
    "survival",
]
