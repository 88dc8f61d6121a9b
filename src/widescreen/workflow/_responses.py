"""Screening many responses in one pass over the store: a response matrix of width K.

A response matrix ``Y`` (n analysed samples x K) holds a trait per column, or copies of one response
restricted to subsets of the samples (half-samples, training folds): NaN marks a sample that is not part
of response k. `screen_responses` reads every block once for all K and gives each response what
`screen_problem` would give a problem of its own samples alone: its shortlist, its scores, every
feature's statistics (without a run folder) and the shortlist's values.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from ..engine import FeatureFilter, RunFolder, read_columns
from ..schema import read_stats_at
from ._passes import PassContext
from ._problem import Problem, shortlist_size
from ._screen import ScreenResult


def response_names(names, K: int) -> tuple[str, ...]:
    """The responses' names: given (K distinct non-empty texts), or ``y0, y1, ...``."""
    if names is None:
        return tuple(f"y{k}" for k in range(K))
    names = tuple(str(v) for v in names)
    if len(names) != K:
        raise ValueError(f"{len(names)} response names for {K} responses")
    if len(set(names)) != K or not all(names):
        raise ValueError("response names must be distinct and non-empty")
    return names


def screen_responses(
    problem: Problem,
    Y,
    *,
    shortlist: int | str = "auto",
    names=None,
    list_top: int | None = None,
    filters: FeatureFilter | None = None,
    sub_block: int = 1024,
    keep_values: bool = True,
    run: RunFolder | None = None,
    name: str = "screen",
    scheduler=None,
    progress=None,
    memory_budget: int | str | None = None,
) -> list[ScreenResult]:
    """Screen every feature against each of K responses in one pass over the store.

    Parameters
    ----------
    problem : Problem
        The store, family, covariates and analysed samples (its own response is not used).
    Y : array-like of shape (n, K)
        One response per column, on the problem's analysed samples; NaN marks a sample that is not
        part of that response (a missing trait value, a sample outside a half or a fold).
    shortlist : int or "auto"
        Shortlist size of each response; "auto" = floor(n_k / log n_k) for its n_k samples.
    names : sequence of str, optional
        One per response (default ``y0, y1, ...``), kept in each result's ``extra["name"]``.
    list_top : int, optional
        Length of each response's top list when longer than its shortlist.
    filters : FeatureFilter, optional
        Applied per response, to the features' missing rate and mean over its samples.
    sub_block : int
    keep_values : bool
        Fill each result's ``values``: the shortlist's values, read once for all responses after the
        pass, imputed and centred on the response's own samples (memory n x shortlist per response).
    run : RunFolder, optional
        Checkpoint the pass there (statistics of shape (n_features, K) under ``passes/NAME/``); without
        one every feature's statistics are returned in memory.
    name : str
        The pass's name in the run folder.
    scheduler, progress, memory_budget : optional
        As for `screen_problem`.

    Returns
    -------
    list of ScreenResult
        One per response, in the order of the columns of ``Y``: ``index``, ``feature_ids``, ``score``
        (its top ``shortlist``), ``values`` (n x shortlist over all analysed samples; rows outside the
        response's samples are the feature centred on the response's mean, so use its rows),
        ``pass_result`` (its view of the pass, `PassResult.for_response`; ``statistics`` of shape
        (n_features,) without a run folder), ``extra`` = {"name", "response" (its column), "n"
        (its samples), "pass" (the merged `PassResult` of the whole pass)}. Every statistic equals
        that of `screen_problem` on a problem of the response's samples alone (to rounding).

    Raises
    ------
    ValueError
        A bad response matrix, or a family with no response-matrix pass (Cox, the model-free ones:
        screen one response at a time).
    """
    Y = np.asarray(Y, dtype=np.float64)
    Y = Y[:, None] if Y.ndim == 1 else Y
    if Y.ndim != 2 or Y.shape[1] < 1:
        raise ValueError(f"the response matrix must have shape (n, K); got {Y.shape}")
    K = Y.shape[1]
    labels = response_names(names, K)
    n_obs = np.isfinite(Y).sum(axis=0)
    p = problem.source.n_features
    ks = [shortlist_size(shortlist, int(n_k), p, memory_budget) for n_k in n_obs]
    listed = max(max(ks), list_top or 0)
    ctx = PassContext(
        problem,
        filters=filters or FeatureFilter(),
        sub_block=sub_block,
        run=run,
        scheduler=scheduler,
        progress=(lambda pass_name: progress if pass_name == name else None) if progress else None,
        memory_budget=memory_budget,
    )
    merged = ctx.run_spec(ctx.spec_multi(name, Y, keep=listed))
    results = []
    for k in range(K):
        view = merged.for_response(k)
        if list_top is None:
            view = replace(view, topk=_trim(view.topk, ks[k]))
        top = view.topk
        results.append(
            ScreenResult(
                index=top.index[: ks[k]],
                feature_ids=problem.feature_ids(top.index[: ks[k]]),
                score=top.score[: ks[k]],
                values=None,
                pass_result=view,
                problem=problem,
                run=run,
                extra={"name": labels[k], "response": k, "n": int(n_obs[k]), "pass": merged},
            )
        )
    if keep_values:
        _fill_values(problem, results, sub_block)
    return results


def _trim(top, k: int):
    return replace(top, index=top.index[:k], score=top.score[:k])


def _fill_values(problem: Problem, results: list[ScreenResult], sub_block: int) -> None:
    """Each shortlist's values, from one read of the union of the shortlists (each block read once),
    centred on the pass's mean of each feature over the response's samples (missing values -> 0)."""
    union = np.unique(np.concatenate([r.index for r in results] + [np.empty(0, np.int64)]))
    x = read_columns(problem.source, union, rows=problem.rows, kind="float", sub_block=sub_block)
    for r in results:
        cols = x[:, np.searchsorted(union, r.index)]
        mean = response_means(r)
        r.values = np.asfortranarray(np.where(np.isfinite(cols), cols - mean, 0.0))


def response_means(result: ScreenResult) -> np.ndarray:
    """The pass's mean of each shortlisted feature over the response's samples."""
    view = result.pass_result
    if view.stats is not None:
        return view.stats["mean"][result.index]
    return read_stats_at(result.run, view.name, result.index, ("mean",), response=view.response)[
        "mean"
    ]


def shortlist_values(problem: Problem, result: ScreenResult, sub_block: int = 1024) -> np.ndarray:
    """One response's shortlist values (n analysed samples x shortlist), read after the pass; as
    ``screen_responses(..., keep_values=True)`` gives them, for one response at a time."""
    _fill_values(problem, [result], sub_block)
    return result.values


__all__ = ["response_names", "screen_responses", "shortlist_values"]
