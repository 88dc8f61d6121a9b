"""The ``run`` workflow on disk: iterative screening of a store into a run folder, with its tables.

Writes into the run folder, besides ``manifest.json`` (with the final ``model``, the same numbers as
model.tsv) and ``passes/NAME/`` (``screen``, ``iter1``, ...; ``screen_a`` / ``screen_b``, ... after
sample splitting): ``model.tsv``, ``iterations.tsv``, ``entries.tsv`` and (without splitting)
``ranking.tsv``. Their columns are specified in `widescreen.schema` and documented in the README.
"""

from __future__ import annotations

import os
import time

import numpy as np

from ..schema import ENTRIES, ITERATIONS, MODEL, RANKING, IterationRecord
from ._iterate import IterateConfig, IterativeResult, iterate
from ._problem import load_problem
from ._screen import dataset_record
from ._session import open_session
from ._tables import entries_text, iterations_text, model_record, model_text, ranking_text


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
    config.filters.check(problem.source.value_kind)
    with open_session(
        out, "run", config.to_dict(), dataset_record(problem), restart=restart
    ) as session:
        session.manifest["samples"] = problem.samples
        session.manifest["covariates"] = problem.covariate_coding
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
        session.manifest["model"] = model_record(result).to_dict()
        records = [IterationRecord.from_dict(r) for r in result.iterations]
        write = session.run.write_table
        if not config.split:
            top = result.screen[0].topk
            shortlisted = np.isin(top.index, records[0].candidates)
            write(
                RANKING.file,
                ranking_text(
                    problem, session.run, result.screen[0], top.index, top.score, shortlisted
                ),
            )
        write(ITERATIONS.file, iterations_text(records, config.criterion))
        write(ENTRIES.file, entries_text(problem, records))
        write(MODEL.file, model_text(result))
        session.finish(seconds_total=round(time.perf_counter() - t0, 3))
        return result


__all__ = ["run"]
