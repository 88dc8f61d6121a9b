"""What a family is: the whole plug-in of an outcome type, declared in one class.

A `Family` says everything a workflow needs to screen and fit its outcome, so no workflow code asks
which family it runs:

- the response: which outcome-table columns it reads (`response_columns`), how raw values are validated
  and coded (`code`, reached from a table by `response` and from arrays by `response_from_arrays`), and
  the response the refit takes (`refit_response`);
- the screening kernel (`kernel`, `prepare`, `columns`, `pass_columns`) and its `pre_passes`
  (reductions over every block needed before the screening pass, such as HOLP's Gram matrix);
- the refit: its `loss` and whether the model has an `intercept`;
- the iterative pass: how it conditions on the selected set (`conditioning`), and whether it scores
  permuted responses in the same pass (`supports_permutation`).

Adding a family means one new module with a `Family` subclass and one line in the registry
(`widescreen.families.FAMILIES`); the command line's help and the documentation list the registry.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

from ..store import JoinedOutcome, OutcomeError
from ._response import ArrayWhere, Response, TableWhere, Where

#: How an iterative pass conditions on the selected set (see `Family.conditioning`).
CONDITIONING = ("columns", "offset", "score")


@dataclass(frozen=True)
class PrePass:
    """A reduction over every block that a family needs before its screening pass.

    Attributes
    ----------
    name : str
        The keyword under which `Family.prepare` receives the result, and the pass's name in a run folder
        (prefixed by the screening pass it serves).
    chunk : callable (Block) -> ndarray
        One sub-block's part (a module-level function, so it pickles to worker processes). Parts are
        summed in float64 over a fixed tree, so the result is deterministic.
    check : callable (n_analysed) -> None, optional
        Refuses up front (ValueError) when the reduction cannot be done, for example for its memory.
    """

    name: str
    chunk: Callable[[Any], np.ndarray]
    check: Callable[[int], None] | None = None


class Family(ABC):
    """Base of every outcome family.

    Class attributes
    ----------------
    name : str
        The name users pick with ``--family`` (and ``family=`` in the estimators).
    description : str
        One line for the command line's help and the documentation.
    columns : tuple of str
        Kernel outputs recorded for every feature and shown in the ranking (``score`` first).
    loss : str
        Loss of the refit in `widescreen.fit` ("gaussian", "binomial", "poisson", "cox").
    intercept : bool
        Whether the refit model has an intercept (the Cox partial likelihood has none: it cancels).
    takes_event : bool
        Whether the response comes with an event indicator (survival).
    conditioning : {"columns", "offset", "score"}
        How the iterative pass conditions on the selected set: the selected columns join the
        adjustment set (linear: projected out; Cox: refitted with each feature); the current model's
        linear predictor as an offset (model-free); or a score test given the covariates and the
        selected columns at their unpenalised null fit (logistic, Poisson).
    supports_permutation : bool
        Whether the kernel computes null scores for permuted responses in the same pass.
    pre_passes : tuple of PrePass
        Reductions over every block needed before the screening pass; their results reach `prepare`
        as keywords.
    """

    name: ClassVar[str]
    description: ClassVar[str] = ""
    columns: ClassVar[tuple[str, ...]]
    loss: ClassVar[str] = "gaussian"
    intercept: ClassVar[bool] = True
    takes_event: ClassVar[bool] = False
    conditioning: ClassVar[str] = "columns"
    supports_permutation: ClassVar[bool] = False
    pre_passes: ClassVar[tuple[PrePass, ...]] = ()

    # ---------------------------------------------------------------------------------------
    # The response

    @property
    def has_p_values(self) -> bool:
        return "p_value" in self.columns

    def response_columns(self, response: str, event: str | None = None) -> list[str]:
        """Outcome-table columns this family reads."""
        if self.takes_event:
            if event is None:
                raise OutcomeError(
                    f"the {self.name} family needs --event, the column of the event indicator"
                )
            return [response, event]
        if event is not None:
            raise OutcomeError(f"the {self.name} family takes no event column")
        return [response]

    @abstractmethod
    def code(self, where: Where) -> Response:
        """Validate and code the raw response; errors name where the first bad value came from."""

    def response(self, joined: JoinedOutcome, response: str, event: str | None = None) -> Response:
        """The response from an outcome table joined to the store (errors name column and line)."""
        roles = dict(
            zip(("response", "event"), self.response_columns(response, event), strict=False)
        )
        return self.code(TableWhere(joined, roles))

    def response_from_arrays(self, y, event=None, sample_ids: np.ndarray | None = None) -> Response:
        """The response from arrays of shape (n,) (errors name the position or the sample id)."""
        values = {"response": _column(y, "y")}
        if self.takes_event:
            if event is None:
                raise OutcomeError(f"the {self.name} family needs an event indicator")
            values["event"] = _column(event, "event")
            if values["event"].size != values["response"].size:
                raise OutcomeError(
                    f"event has {values['event'].size} values but y has {values['response'].size}"
                )
        elif event is not None:
            raise OutcomeError(f"the {self.name} family takes no event indicator")
        return self.code(ArrayWhere(values, sample_ids))

    def refit_response(self, response: Response) -> np.ndarray:
        """The response as `widescreen.fit.fit_path` takes it for this family's loss."""
        if self.takes_event:
            return np.column_stack([response.y, response.event])  # (time, event)
        return response.y

    # ---------------------------------------------------------------------------------------
    # The screening kernel

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
        **pre: Any,
    ) -> Any:
        """The kernel's response state for one pass (``pre``: the results of the `pre_passes`)."""

    def pass_columns(self, state) -> tuple[str, ...]:
        """Kernel outputs recorded by a pass with this state (some states compute other statistics)."""
        return self.columns

    @staticmethod
    @abstractmethod
    def kernel(block, state) -> dict[str, np.ndarray]:
        """The pure statistics kernel (a module-level function)."""

    # ---------------------------------------------------------------------------------------
    # A response matrix: K responses in one pass

    #: The kernel of a pass over a response matrix (statistics of shape (width, K)), or None when the
    #: family has no vectorised form; set with ``staticmethod`` like `kernel`.
    multi_kernel: ClassVar[Any] = None

    def prepare_multi(self, Y: np.ndarray, covariates: np.ndarray | None) -> Any:
        """The state of a pass over the K responses of ``Y`` (n, K), NaN where a sample is not part
        of a response; each response's statistics are those of a pass over its own samples.

        Raises
        ------
        ValueError
            The family has no such pass (then run one response at a time).
        """
        raise ValueError(
            f"the {self.name} family cannot score several responses in one pass; "
            "screen one response at a time"
        )

    def multi_columns(self) -> tuple[str, ...]:
        """Kernel outputs recorded by a response-matrix pass (each of shape (n_features, K))."""
        return self.columns


def _column(v, name: str) -> np.ndarray:
    a = np.asarray(v)
    if a.ndim == 2 and a.shape[1] == 1:
        a = a[:, 0]
    if a.ndim != 1:
        raise OutcomeError(f"{name} must be one-dimensional; got shape {a.shape}")
    return a


def permuted_copies(y: np.ndarray, n_permutations: int, seed: int) -> np.ndarray:
    """(n, 1 + K): the response followed by K seeded permutations of it."""
    if n_permutations <= 0:
        return y[:, None]
    rng = np.random.default_rng(seed)
    perms = np.stack([rng.permutation(y) for _ in range(n_permutations)], axis=1)
    return np.column_stack([y, perms])


__all__ = ["CONDITIONING", "Family", "PrePass", "Response", "permuted_copies"]
