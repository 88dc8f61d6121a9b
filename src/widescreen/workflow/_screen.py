"""Sure independence screening: one pass, a shortlist, a ranking table in a run folder."""

from __future__ import annotations

import os
import time
from dataclasses import asdict, dataclass, field

import numpy as np

from ..engine._pass import FeatureFilter, PassResult, PassSpec, read_stats, run_pass
from ..engine._runfolder import RunFolder
from ..schema import RANKING
from ._problem import Problem, load_problem, shortlist_size
from ._session import open_session
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
    """

    index: np.ndarray
    feature_ids: np.ndarray
    score: np.ndarray
    values: np.ndarray | None
    pass_result: PassResult
    problem: Problem
    run: RunFolder | None
    extra: dict = field(default_factory=dict)


def dataset_record(problem: Problem) -> dict:
    ds = problem.source.dataset
    return {"path": str(ds.path), "fingerprint": problem.source.token(), "shape": list(ds.shape)}


def screen_spec(
    problem: Problem,
    config: ScreenConfig,
    keep: int,
    name: str = "screen",
    *,
    scheduler=None,
    **prepare,
) -> PassSpec:
    """The pass of a screen: the family's kernel and response state (after a Gram pass for HOLP)."""
    fam = problem.family
    if getattr(fam, "needs_gram", False):
        from ._gram import gram_pass

        prepare["gram"] = gram_pass(
            problem.source, problem.rows, scheduler=scheduler, sub_block=config.sub_block
        )
    state = fam.prepare(problem.response, problem.covariates, **prepare)
    return PassSpec(
        name=name,
        kernel=fam.kernel,
        state=state,
        columns=fam.pass_columns(state),
        keep=keep,
        rows=problem.rows,
        filters=config.filters,
        sub_block=config.sub_block,
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
    the statistics of every feature under ``passes/screen/``. ``memory_budget`` (bytes or a text such
    as "4GB") plans the pass's memory; it is recorded outside the configuration, so a rerun with a
    smaller budget resumes.
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
    keep = shortlist_size(config.shortlist, problem.n, problem.source.n_features)
    listed = max(keep, config.list_top or 0)
    with open_session(
        out, "screen", config.to_dict(), dataset_record(problem), restart=restart
    ) as session:
        session.manifest["samples"] = problem.joined.report()
        if problem.response.mapping:
            session.manifest["response_coding"] = problem.response.mapping
        session.manifest["shortlist_size"] = keep
        spec = screen_spec(problem, config, listed, scheduler=scheduler)
        session.manifest["memory_budget"] = memory_budget
        result = run_pass(
            problem.source,
            spec,
            session.run,
            scheduler=scheduler,
            progress=progress,
            memory_budget=memory_budget,
        )
        session.record_pass("screen", result.summary())
        top = result.topk
        shortlisted = np.arange(top.index.size) < keep
        text = ranking_text(problem, session.run, result, top.index, top.score, shortlisted)
        session.run.write_table(RANKING.file, text)
        session.finish(seconds_total=round(time.perf_counter() - t0, 3))
        return ScreenResult(
            index=top.index[:keep],
            feature_ids=problem.feature_ids(top.index[:keep]),
            score=top.score[:keep],
            values=None if top.values is None else top.values[:, :keep],
            pass_result=result,
            problem=problem,
            run=session.run,
        )


__all__ = ["ScreenConfig", "ScreenResult", "read_stats", "screen"]
