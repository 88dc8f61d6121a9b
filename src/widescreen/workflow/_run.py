"""The ``run`` workflow on disk: iterative screening of a store into a run folder, with its tables.

Writes into the run folder, besides ``manifest.json`` and ``passes/NAME/`` (``screen``, ``iter1``, ...;
``screen_a`` / ``screen_b``, ... after sample splitting):

``model.tsv``
    The final model: a row ``(intercept)`` (for the features as stored, missing values at their mean;
    none for the Cox family, whose partial likelihood has no intercept),
    one row ``covariate:NAME`` per covariate, then one row per selected feature with its coefficient,
    the iteration it entered (0 = the screen), its marginal statistics on all analysed samples
    (``score`` and the family's columns, ``missing_rate``), the imputation ``mean`` and its store index.
``iterations.tsv``
    One row per iteration: the pass(es), new candidates, how many features entered and left the
    selected set, its size, the tuning criterion and lambda, pass and fit seconds, and which features.
``ranking.tsv``
    (without splitting) the screen's top list of d features as `screen` writes it, plus ``passed``:
    whether the threshold kept the feature.
"""

from __future__ import annotations

import os
import time

import numpy as np

from ..report._tables import tsv
from ._iterate import IterateConfig, IterativeResult, iterate
from ._problem import load_problem
from ._screen import dataset_record, ranking_columns
from ._session import open_session


def model_columns(result: IterativeResult) -> dict[str, list]:
    """Columns of ``model.tsv``: intercept and covariate rows first, then the selected features."""
    problem = result.problem
    stat_names = list(result.marginal)
    order = np.lexsort((result.index, -result.marginal["score"], result.entered))
    # The Cox partial likelihood has no intercept: its row would only be a shift that cancels.
    head = [] if problem.family.loss == "cox" else ["(intercept)"]
    head_coef = [] if problem.family.loss == "cox" else [result.intercept]
    head += [f"covariate:{c}" for c in problem.covariate_names]
    na = [float("nan")] * len(head)
    cols: dict[str, list] = {
        "feature": head + [str(f) for f in result.feature_ids[order]],
        "coefficient": [
            *head_coef,
            *result.covariate_coef.tolist(),
            *result.coef[order].tolist(),
        ],
        "entered": ["NA"] * len(head) + result.entered[order].tolist(),
    }
    for c in stat_names:
        cols[c] = na + result.marginal[c][order].tolist()
    cols["mean"] = na + result.mean[order].tolist()
    cols["index"] = ["NA"] * len(head) + result.index[order].tolist()
    return cols


def iterations_columns(result: IterativeResult, criterion: str) -> dict[str, list]:
    """Columns of ``iterations.tsv``, one row per iteration."""
    recs = result.iterations
    lam = [r["model"]["lambda"] for r in recs]
    return {
        "iteration": [r["iteration"] for r in recs],
        "passes": [",".join(r["passes"]) for r in recs],
        "candidates": [r["n_candidates"] for r in recs],
        "entered": [len(r["entered"]) for r in recs],
        "left": [len(r["left"]) for r in recs],
        "selected": [r["selected_size"] for r in recs],
        "criterion": [criterion if r["refit"] else "-" for r in recs],
        "criterion_value": [r["model"]["criterion_value"] for r in recs],
        "lambda": [float("nan") if v is None else v for v in lam],
        "pass_seconds": [r["pass_seconds"] for r in recs],
        "fit_seconds": [r["model"]["seconds"] if r["refit"] else 0.0 for r in recs],
        "entered_features": [",".join(r["entered"]) or "-" for r in recs],
        "left_features": [",".join(r["left"]) or "-" for r in recs],
    }


def run(
    store: str | os.PathLike,
    outcome: str | os.PathLike,
    config: IterateConfig,
    out: str | os.PathLike,
    *,
    scheduler=None,
    progress=None,
    restart: bool = False,
    memory_budget: int | str | None = None,
) -> IterativeResult:
    """Iterative screening of every feature of ``store``; write the run folder ``out``.

    Parameters
    ----------
    store : path of the dataset store
    outcome : path of the outcome table (TSV, first column sample id)
    config : IterateConfig
    out : path of the run folder; rerunning the same command on it resumes pass by pass
    scheduler : optional
    progress : callable(pass name) -> callable(done, total), optional
    restart : discard what the folder holds and start over
    memory_budget : int or str, optional
        Memory the passes may use. Recorded outside the configuration, so a rerun with a smaller
        budget (after running out of memory) resumes.

    Returns
    -------
    IterativeResult
    """
    t0 = time.perf_counter()
    problem = load_problem(
        store,
        outcome,
        response=config.response,
        family=config.family,
        covariates=config.covariates,
        event=config.event,
    )
    with open_session(
        out, "run", config.to_dict(), dataset_record(problem), restart=restart
    ) as session:
        session.manifest["samples"] = problem.joined.report()
        if problem.response.mapping:
            session.manifest["response_coding"] = problem.response.mapping
        session.manifest["memory_budget"] = memory_budget
        result = iterate(
            problem,
            config,
            session=session,
            scheduler=scheduler,
            progress=progress,
            memory_budget=memory_budget,
        )
        session.manifest["size_budget"] = result.budget
        session.manifest["selected"] = [str(f) for f in result.feature_ids]
        if not config.split:
            top = result.screen[0].topk
            cols = ranking_columns(
                problem, session.run, result.screen[0], "screen", top.index, top.score
            )
            cols["passed"] = np.isin(top.index, result.iterations[0]["candidates"])
            session.run.write_table("ranking.tsv", tsv(cols))
        session.run.write_table("iterations.tsv", tsv(iterations_columns(result, config.criterion)))
        session.run.write_table("model.tsv", tsv(model_columns(result)))
        session.finish(seconds_total=round(time.perf_counter() - t0, 3))
        return result


__all__ = ["iterations_columns", "model_columns", "run"]
