"""What a family is: one object that supplies the screening kernel, the refit loss and the conditioning rule.

Adding a family means one new module with a `Family` subclass and one line in the registry
(`widescreen.families.FAMILIES`).
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np

from ..store._outcome import JoinedOutcome, OutcomeError


@dataclass(frozen=True)
class Response:
    """A validated response, aligned with the joined samples.

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


class Family(ABC):
    """Base of every outcome family.

    Class attributes
    ----------------
    name : str
        The name users pick with ``--family``.
    columns : tuple of str
        Kernel outputs recorded for every feature and shown in the ranking (``score`` first).
    loss : str
        Loss of the refit in `widescreen.fit` ("gaussian", "binomial", "poisson", "cox").
    conditioning : {"columns", "offset", "score"}
        How the iterative pass conditions on the selected set: project the selected columns out
        (linear); add the current model's linear predictor as an offset (Cox, model-free); or both,
        a score test at the current fit adjusted for the selected columns (logistic, Poisson).
    supports_permutation : bool
        Whether the kernel computes null scores for permuted responses in the same pass.
    """

    name: ClassVar[str]
    columns: ClassVar[tuple[str, ...]]
    loss: ClassVar[str] = "gaussian"
    conditioning: ClassVar[str] = "columns"
    supports_permutation: ClassVar[bool] = False
    description: ClassVar[str] = ""

    def response_columns(self, response: str, event: str | None = None) -> list[str]:
        """Outcome-table columns this family reads."""
        if event is not None:
            raise OutcomeError(f"the {self.name} family takes no event column")
        return [response]

    @abstractmethod
    def response(self, joined: JoinedOutcome, response: str, event: str | None = None) -> Response:
        """Validate and code the response; errors name the column and the first bad line."""

    @abstractmethod
    def prepare(
        self,
        response: Response,
        covariates: np.ndarray | None,
        *,
        conditioning: np.ndarray | None = None,
        offset: np.ndarray | None = None,
        n_permutations: int = 0,
        seed: int = 0,
    ) -> Any:
        """The kernel's response state for one pass."""

    def pass_columns(self, state) -> tuple[str, ...]:
        """Kernel outputs recorded by a pass with this state (some states compute other statistics)."""
        return self.columns

    def refit_response(self, response: Response) -> np.ndarray:
        """The response as `widescreen.fit.fit_path` takes it for this family's loss."""
        if response.event is not None:
            return np.column_stack([response.y, response.event])  # Cox: (time, event)
        return response.y

    @staticmethod
    @abstractmethod
    def kernel(block, state) -> dict[str, np.ndarray]:
        """The pure statistics kernel (a module-level function)."""


def numeric_response(joined: JoinedOutcome, column: str) -> np.ndarray:
    y = joined.numeric(column)
    bad = ~np.isfinite(y)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise OutcomeError(
            f"{joined.table.path}: column {column!r}, line {joined.lines[i]}: value is not finite"
        )
    return y


def permuted_copies(y: np.ndarray, n_permutations: int, seed: int) -> np.ndarray:
    """(n, 1 + K): the response followed by K seeded permutations of it."""
    if n_permutations <= 0:
        return y[:, None]
    rng = np.random.default_rng(seed)
    perms = np.stack([rng.permutation(y) for _ in range(n_permutations)], axis=1)
    return np.column_stack([y, perms])
