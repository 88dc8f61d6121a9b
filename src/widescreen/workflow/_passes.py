"""The one pass builder: every pass of screen, run and the estimators is made and run here.

`PassContext.spec` turns a problem, the samples analysed (all, or a half when splitting), the features
kept off the list (the selected set) and the conditioning (selected columns or an offset) into a
`PassSpec`: it runs the family's pre-passes first (HOLP's Gram matrix; each once per set of samples,
checkpointed in the run folder), then asks the family for its kernel's response state. Nothing here
knows which family it builds for: what a family needs, it declares (`widescreen.families.Family`).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from functools import partial
from typing import Any

import numpy as np
from dask.base import tokenize

from ..engine import (
    BlockSource,
    FeatureFilter,
    PassResult,
    PassSpec,
    RunFolder,
    parse_budget,
    reduce_blocks,
    run_pass,
)
from ..families import PrePass
from ..store import prepare_block
from ._problem import Problem


@dataclass
class PassContext:
    """What every pass of one run shares, and the builder of its passes.

    Attributes
    ----------
    problem : Problem
    filters : FeatureFilter
    sub_block : int
    run : RunFolder or None
        Without one, passes keep their statistics in memory.
    scheduler : optional
        Where the passes run (see `widescreen.engine.open_executor`).
    progress : callable(pass name) -> callable(done, total) or None, optional
    memory_budget : int or str, optional
        Memory the passes may use (see `widescreen.engine.plan_memory`).
    """

    problem: Problem
    filters: FeatureFilter = field(default_factory=FeatureFilter)
    sub_block: int = 1024
    run: RunFolder | None = None
    scheduler: Any = None
    progress: Callable[[str], Any] | None = None
    memory_budget: int | str | None = None
    _pre: dict = field(default_factory=dict, repr=False)

    def spec(
        self,
        name: str,
        *,
        keep: int,
        sel: np.ndarray | None = None,
        exclude: np.ndarray | None = None,
        conditioning: np.ndarray | None = None,
        offset: np.ndarray | None = None,
        n_permutations: int = 0,
        seed: int = 0,
        keep_values: bool = True,
    ) -> PassSpec:
        """The pass ``name`` over the samples at positions ``sel`` (all when None).

        Parameters
        ----------
        name : str
            Its name in the run folder ("screen", "iter2", "screen_a", ...).
        keep : int
            Length of its top list.
        sel : ndarray of int, optional
            Positions among the analysed samples (a half when splitting).
        exclude : ndarray of int, optional
            Store indices kept off the list (the selected set).
        conditioning : ndarray of shape (n, s), optional
            The selected columns, for families that condition on columns.
        offset : ndarray of shape (n,), optional
            The current model's linear predictor, for families that condition through an offset.
        n_permutations, seed : int
            Permuted responses scored in the same pass, and their seed.
        keep_values : bool
            Keep the top list's imputed, centred values (for a refit without a second read).

        Raises
        ------
        ValueError
            The family cannot prepare this pass (its message says why).
        """
        problem, fam = self.problem, self.problem.family
        resp, Z, rows = _subset(problem, sel)
        kwargs: dict[str, Any] = {"n_permutations": n_permutations, "seed": seed}
        if conditioning is not None:
            kwargs["conditioning"] = conditioning if sel is None else conditioning[sel]
        if offset is not None:
            kwargs["offset"] = offset if sel is None else offset[sel]
        for pre in fam.pre_passes:
            kwargs[pre.name] = self.pre_pass(pre, name, rows)
        state = fam.prepare(resp, Z, **kwargs)
        return PassSpec(
            name=name,
            kernel=fam.kernel,
            state=state,
            columns=fam.pass_columns(state),
            keep=keep,
            rows=rows,
            exclude=np.empty(0, np.int64) if exclude is None else exclude,
            filters=self.filters,
            keep_values=keep_values,
            sub_block=self.sub_block,
        )

    def spec_multi(
        self, name: str, Y: np.ndarray, *, keep: int, exclude: np.ndarray | None = None
    ) -> PassSpec:
        """A pass over the K responses of ``Y`` (n analysed samples, K): NaN leaves a sample out of
        a response (`widescreen.families.Family.prepare_multi`).

        Raises
        ------
        ValueError
            The family has no response-matrix pass, or cannot prepare one of the responses.
        """
        problem, fam = self.problem, self.problem.family
        Y = np.asarray(Y, dtype=np.float64)
        Y = Y[:, None] if Y.ndim == 1 else Y
        if Y.ndim != 2 or Y.shape[0] != problem.n:
            raise ValueError(
                f"the response matrix must have one row per analysed sample ({problem.n}); "
                f"got shape {Y.shape}"
            )
        if fam.takes_event:  # survival: the times of Y share the problem's event indicator
            state = fam.prepare_multi(Y, problem.covariates, event=problem.response.event)
        else:
            state = fam.prepare_multi(Y, problem.covariates)
        return PassSpec(
            name=name,
            kernel=fam.multi_kernel,
            state=state,
            columns=fam.multi_columns(),
            keep=keep,
            rows=problem.rows,
            exclude=np.empty(0, np.int64) if exclude is None else exclude,
            filters=self.filters,
            keep_values=False,
            sub_block=self.sub_block,
            temporaries=3.0,
        )

    def run_spec(self, spec: PassSpec) -> PassResult:
        """Run a pass built by `spec` (resuming from the run folder's checkpoints)."""
        return run_pass(
            self.problem.source,
            spec,
            self.run,
            scheduler=self.scheduler,
            progress=self._progress(spec.name),
            memory_budget=self.memory_budget,
        )

    def pre_pass(self, pre: PrePass, for_pass: str, rows: np.ndarray | None) -> np.ndarray:
        """The result of a family's pre-pass on the given rows: computed once per set of rows.

        With a run folder it is checkpointed under ``passes/<pass>-<pre-pass>/`` (named after the first
        pass that needs it), group by group, so an interrupted pre-pass resumes.
        """
        source = self.problem.source
        key = (pre.name, tokenize(rows))
        if key in self._pre:
            return self._pre[key]
        n = source.n_samples if rows is None else len(rows)
        if pre.check is not None:
            budget = parse_budget(self.memory_budget)
            pre.check(n) if budget is None else pre.check(n, budget)
        name = f"{for_pass}-{pre.name}"
        token = tokenize(pre.chunk.__module__, pre.chunk.__qualname__, rows, self.sub_block)
        result = reduce_blocks(
            source,
            partial(_pre_pass_block, fn=pre.chunk, rows=rows, sub_block=self.sub_block),
            name=name,
            token=token,
            checkpoint=None if self.run is None else self.run.layout.reduction(name).root,
            scheduler=self.scheduler,
            progress=self._progress(name),
        )
        self._pre[key] = result
        return result

    def _progress(self, name: str):
        return self.progress(name) if self.progress is not None else None


def _pre_pass_block(source: BlockSource, i: int, fn, rows, sub_block: int) -> np.ndarray:
    """One block's part of a pre-pass: the sum of ``fn`` over its sub-blocks (prepared as a pass does)."""
    start, stop = source.bounds(i)
    raw = source.read(i)
    total = None
    for a in range(0, stop - start, sub_block):
        b = min(a + sub_block, stop - start)
        part = fn(prepare_block(raw[:, a:b], start + a, rows))
        total = part if total is None else total + part
    return total


def _subset(problem: Problem, sel: np.ndarray | None):
    """Response, covariates and store rows restricted to the analysed samples at positions ``sel``."""
    resp, Z, rows = problem.response, problem.covariates, problem.rows
    if sel is None:
        return resp, Z, rows
    Z = None if Z is None else Z[sel]
    rows = sel if rows is None else rows[sel]
    return resp.subset(sel), Z, rows


__all__ = ["PassContext"]
