"""The one call from the estimators into the workflow, once inputs are validated and aligned."""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from ..engine._pass import PassResult, run_pass
from ..families import Family, Response
from ..store._outcome import JoinedOutcome, OutcomeTable
from ..workflow._iterate import IterateConfig, IterativeResult, iterate
from ..workflow._problem import Problem, shortlist_size
from ..workflow._screen import ScreenConfig, screen_spec
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
    ids = design.ids if design.ids is not None else np.arange(n).astype(str)
    rows = np.arange(n, dtype=np.int64) if design.rows is None else design.rows
    table = OutcomeTable(path="<array>", ids=ids, columns={})  # type: ignore[arg-type]
    joined = JoinedOutcome(table, rows, ids, {}, np.arange(n) + 2, n, design.source.n_samples, 0)
    return Problem(
        design.source, joined, family, response, covariates, covariate_names, design.rows
    )


def screen_once(
    problem: Problem, shortlist: int | str, *, scheduler=None
) -> tuple[PassResult, int]:
    """The screening pass of `widescreen.workflow.screen` (with HOLP's Gram pass), without a run folder."""
    k = shortlist_size(shortlist, problem.n, problem.source.n_features)
    config = ScreenConfig(response="y", family=problem.family.name, shortlist=k)
    # The selector keeps no shortlist values: transform reads the kept columns of whatever X it gets.
    spec = replace(screen_spec(problem, config, k, scheduler=scheduler), keep_values=False)
    return run_pass(problem.source, spec, None, scheduler=scheduler), k


def iterate_once(problem: Problem, config: IterateConfig, *, scheduler=None) -> IterativeResult:
    """The iterative workflow in memory (no run folder)."""
    return iterate(problem, config, scheduler=scheduler)


__all__ = ["iterate_once", "make_problem", "screen_once"]
