"""The ``run`` workflow on disk: iterative screening of a store into a run folder, with its tables.

Writes into the run folder, besides ``manifest.json`` (with the final ``model``, the same numbers as
model.tsv) and ``passes/NAME/`` (``screen``, ``iter1``, ...; ``screen_a`` / ``screen_b``, ... after
sample splitting): ``model.tsv``, ``iterations.tsv``, ``entries.tsv`` and (without splitting)
``ranking.tsv``; with ``stability`` (`_stability`) ``stability.tsv`` and the manifest's ``stability``,
with ``cv_folds`` (`_crossval`) ``cv.tsv`` and the manifest's ``cv``. Their columns are specified in `widescreen.schema` and documented in the README.
"""

from __future__ import annotations

import os
import time

import numpy as np

from ..schema import CV, ENTRIES, ITERATIONS, MODEL, RANKING, STABILITY, IterationRecord
from ._crossval import cross_validate
from ._iterate import IterateConfig, IterativeResult, iterate
from ._problem import trait_names
from ._screen import open_problem
from ._session import RunSession
from ._stability import stability_selection
from ._subsets import SubsetScreen
from ._tables import (
    cv_text,
    entries_text,
    iterations_text,
    model_record,
    model_text,
    ranking_text,
    stability_text,
)


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
        Or, for several traits (``config.response`` = "a,b,c"), a `TraitsResult`: the first pass shared
        by all traits, then each trait's iteration in ``traits/NAME/`` (`run_traits`).
    """
    if len(trait_names(config.response)) > 1:
        from ._traits import run_traits

        return run_traits(
            store,
            outcome,
            config,
            out,
            scheduler=scheduler,
            progress=progress,
            restart=restart,
            memory_budget=memory_budget,
        )
    t0 = time.perf_counter()
    problem, session = open_problem(store, outcome, config, out, "run", restart=restart)
    with session:
        session.manifest["memory_budget"] = memory_budget
        result = iterate(
            problem,
            config,
            session=session,
            scheduler=scheduler,
            progress=progress,
            memory_budget=memory_budget,
        )
        finish_run(session, problem, config, result, scheduler, progress, memory_budget)
        session.finish(seconds_total=round(time.perf_counter() - t0, 3))
        return result


def _trust(
    result: IterativeResult,
    config: IterateConfig,
    session: RunSession,
    scheduler,
    progress,
    memory_budget,
) -> None:
    """Stability selection and cross-validation of the pipeline, when asked for (into result.extra).

    Each keeps its per-subset progress in the manifest (``stability_state``, ``cv_state``), saved
    after every step, so an interrupted run resumes where it stopped.
    """
    if not config.stability and not config.cv_folds:
        return
    where = SubsetScreen(
        result.problem,
        config.filters,
        config.sub_block,
        scheduler,
        progress,
        memory_budget,
    )
    common = {
        "shortlist": config.shortlist,
        "settings": config.fit,
        "seed": config.seed,
        "n_candidates": result.n_screened,
        "save": session.save,
    }
    m = session.manifest
    if config.stability:
        stab = stability_selection(
            where,
            n_pairs=config.stability,
            threshold=config.stability_threshold,
            state=m.setdefault("stability_state", {}),
            **common,
        )
        result.extra["stability"] = stab
        # Phases a resumed session did not rerun keep the timings of the session that ran them.
        stab.seconds = {**(m.get("stability") or {}).get("seconds", {}), **stab.seconds}
        m["stability"] = stab.record(result.problem)
        _warn(result, m, stab.skipped, "stability selection skipped")
    if config.cv_folds:
        cv = cross_validate(
            where, n_folds=config.cv_folds, state=m.setdefault("cv_state", {}), **common
        )
        result.extra["cv"] = cv
        cv.seconds = {**(m.get("cv") or {}).get("seconds", {}), **cv.seconds}
        m["cv"] = cv.record()
        _warn(result, m, cv.skipped, "cross-validation skipped")
    session.save()


def _warn(result: IterativeResult, manifest: dict, skipped: list[str], what: str) -> None:
    """A warning (CLI, manifest, report cautions) for the subsets that could not be analysed."""
    if skipped:
        msg = (
            f"{what} {len(skipped)} subset(s) that could not be analysed: "
            + "; ".join(skipped[:3])
            + ("; ..." if len(skipped) > 3 else "")
        )
        result.warnings = [*result.warnings, msg]
        manifest["warnings"] = list(result.warnings)


def finish_run(
    session: RunSession,
    problem,
    config: IterateConfig,
    result: IterativeResult,
    scheduler=None,
    progress=None,
    memory_budget=None,
) -> None:
    """After the iteration: record the model in the manifest, run stability selection and
    cross-validation when asked for, and write the tables into the session's run folder."""
    session.manifest["size_budget"] = result.budget
    session.manifest["selected"] = [str(f) for f in result.feature_ids]
    session.manifest["model"] = model_record(result).to_dict()
    if config.stability or config.cv_folds:
        # The model's tables first: should stability selection or cross-validation fail, the
        # finished run is not lost (they are written again with the frequencies).
        write_run_tables(session, problem, config, result)
    _trust(result, config, session, scheduler, progress, memory_budget)
    write_run_tables(session, problem, config, result)


def write_run_tables(session, problem, config: IterateConfig, result: IterativeResult) -> None:
    """Write ranking.tsv (without splitting), iterations.tsv, entries.tsv, model.tsv and, when asked
    for, stability.tsv and cv.tsv into the session's run folder."""
    records = [IterationRecord.from_dict(r) for r in result.iterations]
    write = session.run.write_table
    stab = result.extra.get("stability")
    if stab is not None:
        write(STABILITY.file, stability_text(problem, stab, result.index))
    if result.extra.get("cv") is not None:
        write(CV.file, cv_text(result.extra["cv"]))
    if not config.split:
        top = result.screen[0].topk
        shortlisted = np.isin(top.index, records[0].candidates)
        write(
            RANKING.file,
            ranking_text(
                problem,
                session.run,
                result.screen[0],
                top.index,
                top.score,
                shortlisted,
                None if stab is None else stab.frequency_of(top.index),
            ),
        )
    write(ITERATIONS.file, iterations_text(records, config.criterion))
    write(ENTRIES.file, entries_text(problem, records))
    write(MODEL.file, model_text(result))


__all__ = ["finish_run", "run", "write_run_tables"]
