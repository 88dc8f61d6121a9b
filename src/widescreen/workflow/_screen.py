"""Sure independence screening: one pass, a shortlist, a ranking table in a run folder."""

from __future__ import annotations

import os
import time
from dataclasses import asdict, dataclass, field

import numpy as np

from .._config import check_int, check_keep
from ..engine import FeatureFilter, PassResult, RunFolder, read_stats
from ..schema import RANKING
from ._candidates import pass_lambda_gc
from ._passes import PassContext
from ._problem import (
    Problem,
    check_problem_fields,
    load_problem,
    shortlist_notice,
    shortlist_size,
    trait_names,
)
from ._session import RunSession, open_session
from ._tables import ranking_text


@dataclass(frozen=True)
class ScreenConfig:
    """Configuration of a screening run, recorded in the manifest.

    Attributes
    ----------
    response : str
        Outcome-table column of the response (for survival: the time).
    family : str
    covariates : tuple of str
        Outcome-table columns adjusted for.
    event : str, optional
        Survival: the event indicator column.
    shortlist : int or "auto"
        Shortlist size; "auto" = floor(n / log n).
    list_top : int, optional
        Rows of ranking.tsv (default: the shortlist).
    drop_missing, drop_rare : float, optional
        Per-feature filters applied in the pass.
    sub_block : int
        Features prepared at once inside a block (bounds float64 working memory per thread).
    """

    response: str
    family: str = "linear"
    covariates: tuple[str, ...] = ()
    event: str | None = None
    shortlist: int | str = "auto"
    list_top: int | None = None
    drop_missing: float | None = None
    drop_rare: float | None = None
    sub_block: int = 1024

    def __post_init__(self) -> None:
        check_problem_fields(self)
        check_keep("shortlist", self.shortlist)
        check_int("list_top", self.list_top, 1, optional=True)

    def to_dict(self) -> dict:
        d = asdict(self)
        d["covariates"] = list(self.covariates)
        return d

    @property
    def filters(self) -> FeatureFilter:
        return FeatureFilter(drop_missing=self.drop_missing, drop_rare=self.drop_rare)


@dataclass
class ScreenResult:
    """What a screen found.

    Attributes
    ----------
    index : ndarray of int, shape (k,)
        Store indices of the shortlisted features, strongest first.
    feature_ids : ndarray of str
    score : ndarray of float
    values : ndarray of shape (n, k)
        Imputed, centred values of the shortlist (for a refit without a second read).
    pass_result : PassResult
    problem : Problem
    run : RunFolder or None
    lambda_gc : float or None
        Genomic inflation factor of the pass's p-values (`screen` with a run folder; None where the
        family has no test).
    """

    index: np.ndarray
    feature_ids: np.ndarray
    score: np.ndarray
    values: np.ndarray | None
    pass_result: PassResult
    problem: Problem
    run: RunFolder | None
    extra: dict = field(default_factory=dict)
    lambda_gc: float | None = None
    notice: str | None = None

    @property
    def statistics(self) -> dict[str, np.ndarray] | None:
        """Every feature's statistics (shape (n_features,) each), when the pass ran without a run folder."""
        return self.pass_result.stats


def dataset_record(problem: Problem) -> dict:
    ds = problem.source.dataset
    return {
        "path": str(ds.path),
        "fingerprint": problem.source.token(),
        "shape": list(ds.shape),
        "outcome": {"path": str(problem.joined.table.path), **problem.joined.digest()},
    }


def record_problem(session: RunSession, problem: Problem) -> None:
    """Record in the session's manifest how the samples were matched and the covariates and
    response coded."""
    session.manifest["samples"] = problem.samples
    session.manifest["covariates"] = problem.covariate_coding
    if problem.response.mapping:
        session.manifest["response_coding"] = problem.response.mapping


def open_problem(
    store, outcome, config, out, command: str, *, restart: bool
) -> tuple[Problem, RunSession]:
    """The file route's start of `screen` and `run`: the problem ``config`` names (the store joined to
    the outcome table, the filters checked against the store), and its run session, opened under the
    folder's lock with the problem recorded (`record_problem`)."""
    problem = load_problem(
        store,
        outcome,
        response=config.response,
        family=config.family,
        covariates=config.covariates,
        event=config.event,
    )
    config.filters.check(problem.source.value_kind)
    session = open_session(out, command, config.to_dict(), dataset_record(problem), restart=restart)
    record_problem(session, problem)
    return problem, session


def screen_problem(
    problem: Problem,
    *,
    shortlist: int | str = "auto",
    list_top: int | None = None,
    filters: FeatureFilter | None = None,
    sub_block: int = 1024,
    keep_values: bool = True,
    run: RunFolder | None = None,
    scheduler=None,
    progress=None,
    memory_budget: int | str | None = None,
) -> ScreenResult:
    """Screen every feature of a problem in one pass: the array-level core of `screen`.

    The estimators call this after validating their inputs (`Problem.from_arrays`); `screen` calls it
    inside a run session.

    Parameters
    ----------
    problem : Problem
    shortlist : int or "auto"
        Shortlist size; "auto" = floor(n / log n).
    list_top : int, optional
        Length of the pass's top list when longer than the shortlist (the ranking table's rows).
    filters : FeatureFilter, optional
    sub_block : int
    keep_values : bool
        Keep the shortlist's imputed, centred values (``ScreenResult.values``).
    run : RunFolder, optional
        Checkpoint the pass there; without one, every feature's statistics are returned in memory
        (``ScreenResult.statistics``).
    scheduler, progress, memory_budget : optional
        As for `widescreen.engine.run_pass` (``progress``: callable(done, total)).

    Returns
    -------
    ScreenResult
    """
    k = shortlist_size(shortlist, problem.n, problem.source.n_features, memory_budget)
    listed = max(k, list_top or 0)
    ctx = PassContext(
        problem,
        filters=filters or FeatureFilter(),
        sub_block=sub_block,
        run=run,
        scheduler=scheduler,
        progress=(lambda name: progress if name == "screen" else None) if progress else None,
        memory_budget=memory_budget,
    )
    result = ctx.run_spec(ctx.spec("screen", keep=listed, keep_values=keep_values))
    top = result.topk
    return ScreenResult(
        index=top.index[:k],
        feature_ids=problem.feature_ids(top.index[:k]),
        score=top.score[:k],
        values=None if top.values is None else top.values[:, :k],
        pass_result=result,
        problem=problem,
        run=run,
    )


def screen(
    store: str | os.PathLike,
    outcome: str | os.PathLike,
    config: ScreenConfig,
    out: str | os.PathLike,
    *,
    scheduler=None,
    progress=None,
    restart: bool = False,
    memory_budget: int | str | None = None,
) -> ScreenResult:
    """Screen every feature of ``store`` for association with the outcome; write the run folder.

    Writes ``manifest.json``, ``ranking.tsv`` (the shortlist, or ``list_top`` rows, in rank order) and
    the statistics of every feature under ``passes/screen/``. Several traits (``config.response`` =
    "a,b,c") are screened in one pass into ``traits/NAME/`` folders with a summary ``traits.tsv``
    (`widescreen.workflow.screen_traits`; returns a `TraitsResult`). ``memory_budget`` (bytes or a text such
    as "4GB") plans the pass's memory; it is recorded outside the configuration, so a rerun with a
    smaller budget resumes.
    """
    if len(trait_names(config.response)) > 1:
        from ._traits import screen_traits

        return screen_traits(
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
    problem, session = open_problem(store, outcome, config, out, "screen", restart=restart)
    with session:
        keep = shortlist_size(config.shortlist, problem.n, problem.source.n_features, memory_budget)
        session.manifest["shortlist_size"] = keep
        capped = shortlist_notice(config.shortlist, problem.n, memory_budget)
        if capped is not None and capped["size"] == keep:
            session.manifest["shortlist_cap"] = capped
        session.manifest["memory_budget"] = memory_budget
        found = screen_problem(
            problem,
            shortlist=config.shortlist,
            list_top=config.list_top,
            filters=config.filters,
            sub_block=config.sub_block,
            # The ranking needs no values: none are carried through the merges (at large n and d
            # they cost more than the pass: n x d float64 per block and merge).
            keep_values=False,
            run=session.run,
            scheduler=scheduler,
            progress=progress,
            memory_budget=memory_budget,
        )
        result = found.pass_result
        session.record_pass("screen", result.summary())
        lam = pass_lambda_gc(problem, session.run, result, np.empty(0, dtype=np.int64))
        session.manifest["lambda_gc"] = {"screen": lam}
        found.lambda_gc = lam
        top = result.topk
        shortlisted = np.arange(top.index.size) < keep
        text = ranking_text(problem, session.run, result, top.index, top.score, shortlisted)
        session.run.write_table(RANKING.file, text)
        if "shortlist_cap" in session.manifest:
            found.notice = session.manifest["shortlist_cap"]["notice"]
        session.finish(seconds_total=round(time.perf_counter() - t0, 3))
        return found


__all__ = ["ScreenConfig", "ScreenResult", "read_stats", "screen", "screen_problem"]
