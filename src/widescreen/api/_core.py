"""The one call from the estimators into the workflow, once inputs are validated and aligned."""

from __future__ import annotations

import numpy as np

from ..engine import PassResult
from ..families import Family
from ..workflow import (
    IterateConfig,
    IterativeResult,
    Problem,
    iterate,
    screen_problem,
    shortlist_size,
)
from ._inputs import Design
from ._target import Target


def make_problem(
    design: Design,
    family: Family,
    target: Target,
    covariates: np.ndarray | None,
    covariate_names: tuple[str, ...],
) -> Problem:
    """The workflow's problem over X's samples; the family validates the response here.

    A store view passes its sample ids, so the problem reads the view's rows of the store; y and the
    covariates are already in X's order.
    """
    return Problem.from_arrays(
        design.source,
        target.y,
        family=family,
        event=target.event,
        covariates=covariates,
        covariate_names=covariate_names or None,
        sample_ids=design.ids if design.rows is not None else None,
    )


def screen_once(
    problem: Problem, shortlist: int | str, *, scheduler=None
) -> tuple[PassResult, int]:
    """The screening pass of `widescreen.workflow.screen` (with HOLP's Gram pass), without a run folder."""
    k = shortlist_size(shortlist, problem.n, problem.source.n_features)
    # The selector keeps no shortlist values: transform reads the kept columns of whatever X it gets.
    found = screen_problem(problem, shortlist=k, keep_values=False, scheduler=scheduler)
    return found.pass_result, k


def iterate_once(problem: Problem, config: IterateConfig, *, scheduler=None) -> IterativeResult:
    """The iterative workflow in memory (no run folder)."""
    return iterate(problem, config, scheduler=scheduler)


__all__ = ["iterate_once", "make_problem", "screen_once"]
