"""The one call from the estimators into the workflow, once inputs are validated and aligned."""

from __future__ import annotations

import numpy as np

from ..engine import PassResult
from ..families import Family, Response
from ..workflow import (
    IterateConfig,
    IterativeResult,
    Problem,
    iterate,
    screen_problem,
    shortlist_size,
)
from ._inputs import Design


def make_problem(
    design: Design,
    family: Family,
    response: Response,
    covariates: np.ndarray | None,
    covariate_names: tuple[str, ...],
) -> Problem:
    """A workflow problem over X's samples (store rows when X is a view of a store)."""
    n = design.n
    return Problem(
        source=design.source,
        family=family,
        response=response,
        covariates=covariates,
        covariate_names=covariate_names,
        rows=design.rows,
        sample_ids=design.ids if design.ids is not None else np.arange(n).astype(str),
        samples={"n_analysed": n, "n_store": design.source.n_samples},
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
