"""Iterative sure independence screening (ISIS), out of core: screen, fit, condition, refit, repeat.

Fan & Lv (2008) Section 4.2 and Fan, Samworth & Wu (2009, JMLR 10:2013), the "vanilla" iteration:

1. screen every feature marginally and keep the top d (the size budget) that pass the threshold;
2. fit the penalised model on them; its non-zero coefficients are the selected set M;
3. rank every feature outside M conditionally on M (a pass over the whole store) and keep the top
   d - |M| new candidates that pass the threshold;
4. refit on M plus the candidates (features may leave M); repeat from 3 until M stops changing, |M|
   reaches d, no new candidate passes, M returns to an earlier set, M is empty, the family cannot
   condition on the model (for example no variation left), or after ``max_iter`` conditional passes.

With ``split`` every step screens two random halves of the samples and keeps only features in the top
list of both (the "var" variant of FSW 2009, see `_split`). ``max_iter = 0`` gives plain SIS + refit.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field, fields

import numpy as np

from .._config import ConfigError, check_int, check_keep, check_number
from ..engine import FeatureFilter, PassResult, RunFolder, read_columns
from ..schema import FitRecord, IterationRecord
from ..store import prepare_block
from ._candidates import Candidates, ConditioningError, StepContext, screen_step, stats_at
from ._problem import Problem, check_problem_fields, shortlist_notice, shortlist_size
from ._refit import (
    FitSettings,
    FittedModel,
    Refit,
    budget_warning,
    check_refit_memory,
    final_refit,
    fit_token,
    fit_union,
)
from ._session import RunSession
from ._split import split_halves
from ._thresholds import ThresholdRule


@dataclass(frozen=True)
class IterateConfig:
    """Configuration of an iterative screening run, recorded in the manifest.

    Attributes
    ----------
    response : str
        Outcome-table column of the response (survival: the time); ignored for arrays.
    family : str
    covariates : tuple of str
    event : str, optional
    shortlist : int or "auto"
        The size budget d; "auto" = floor(n / log n).
    penalty : str
        "scad", "mcp", "lasso", "enet", "adaptive_lasso" or "dantzig".
    criterion : {"ebic", "bic", "cv"}
    ebic_gamma : float, optional
    cv : int
    n_lambda : int
    max_iter : int
        Conditional passes at most (0: SIS and one fit).
    threshold : {"none", "permutation", "bonferroni", "bh"}
    alpha : float
    n_permutations : int
    split : bool
        Screen two random halves and keep the intersection of their top lists.
    seed : int
        Seeds the halves, the permutations and the cross-validation folds.
    drop_missing, drop_rare : float, optional
    sub_block : int
    stability : int
        B complementary pairs of half-samples for stability selection (0: off; ``run`` only).
    stability_threshold : float
        pi_thr in (1/2, 1]: the stable set is the features selected in at least this share of the
        halves.
    cv_folds : int
        K-fold cross-validation of the screen -> refit pipeline (0: off; ``run`` only).
    """

    response: str = "y"
    family: str = "linear"
    covariates: tuple[str, ...] = ()
    event: str | None = None
    shortlist: int | str = "auto"
    penalty: str = "scad"
    criterion: str = "ebic"
    ebic_gamma: float | None = None
    cv: int = 5
    n_lambda: int = 100
    max_iter: int = 5
    threshold: str = "none"
    alpha: float = 0.05
    n_permutations: int = 100
    split: bool = False
    seed: int = 0
    drop_missing: float | None = None
    drop_rare: float | None = None
    sub_block: int = 1024
    stability: int = 0
    stability_threshold: float = 0.6
    cv_folds: int = 0

    def __post_init__(self) -> None:
        check_problem_fields(self)
        check_keep("shortlist", self.shortlist)
        check_int("max_iter", self.max_iter, 0)
        check_int("stability", self.stability, 0)
        check_number("stability_threshold", self.stability_threshold, 0.5, 1.0, open_low=True)
        check_int("cv_folds", self.cv_folds, 0)
        if self.cv_folds == 1:
            raise ConfigError("cv_folds", "0 (off) or at least 2", self.cv_folds)
        check_int("seed", self.seed, 0)
        if not isinstance(self.split, bool):
            raise ConfigError("split", "True or False", self.split)
        _ = self.fit  # validates penalty, criterion, ebic_gamma, cv, n_lambda (`FitSettings`)
        _ = self.rule  # validates threshold, alpha and n_permutations (`ThresholdRule`)

    @property
    def rule(self) -> ThresholdRule:
        return ThresholdRule(self.threshold, self.alpha, self.n_permutations)

    @property
    def fit(self) -> FitSettings:
        return FitSettings(
            self.penalty, self.criterion, self.ebic_gamma, self.cv, self.n_lambda, self.seed
        )

    @property
    def filters(self) -> FeatureFilter:
        return FeatureFilter(drop_missing=self.drop_missing, drop_rare=self.drop_rare)

    def to_dict(self) -> dict:
        d = asdict(self)
        d["covariates"] = list(self.covariates)
        # Off, these settings are left out of the record: run folders made before they existed
        # still resume.
        if not self.stability:
            del d["stability"], d["stability_threshold"]
        if not self.cv_folds:
            del d["cv_folds"]
        return d

    @classmethod
    def from_dict(cls, d: dict) -> IterateConfig:
        names = {f.name for f in fields(cls)}
        d = {k: v for k, v in d.items() if k in names}
        d["covariates"] = tuple(d.get("covariates", ()))
        return cls(**d)


@dataclass
class IterativeResult:
    """The final model of an iterative run and how it was reached.

    Attributes
    ----------
    index : ndarray of int of shape (k,)
        Store indices of the selected features, increasing.
    feature_ids : ndarray of str of shape (k,)
    coef : ndarray of shape (k,)
        Coefficients per unit of each feature.
    intercept : float
        Intercept for the features as stored (missing values replaced by ``mean``).
    covariate_coef : ndarray of shape (q,)
    mean : ndarray of shape (k,)
        Imputation means of the selected features over the analysed samples.
    entered : ndarray of int of shape (k,)
        Iteration in which each selected feature (last) entered the selected set (0 = the screen).
    marginal : dict of str -> ndarray of shape (k,)
        The selected features' marginal statistics (the family's columns and ``missing_rate``).
    iterations : list of dict
        One record per iteration (what entered and left, size, criterion, lambda, timings).
    stop_reason : str
    budget : int
        The size budget d.
    n_screened : int
        Features the screen tested (not filtered).
    model : FittedModel
    screen : list of PassResult
        The first step's pass(es).
    problem : Problem
    run : RunFolder or None
    refit : Refit, optional
        The unpenalised refit of the selected features as stored, with the covariates: coefficients
        and standard errors (not valid for inference after selection).
    warnings : list of str
        Advice about the run (for example a model that fills the size budget).
    """

    index: np.ndarray
    feature_ids: np.ndarray
    coef: np.ndarray
    intercept: float
    covariate_coef: np.ndarray
    mean: np.ndarray
    entered: np.ndarray
    marginal: dict[str, np.ndarray]
    iterations: list[dict]
    stop_reason: str
    budget: int
    n_screened: int
    model: FittedModel
    screen: list[PassResult]
    problem: Problem
    run: RunFolder | None = None
    extra: dict = field(default_factory=dict)
    refit: Refit | None = None
    warnings: list[str] = field(default_factory=list)


class _Pool:
    """Values and imputation means of the features currently fitted, by store index (increasing)."""

    def __init__(self, n: int) -> None:
        self.index = np.empty(0, dtype=np.int64)
        self.values = np.empty((n, 0))
        self.mean = np.empty(0)

    def add(self, c: Candidates) -> None:
        index = np.concatenate([self.index, c.index])
        order = np.argsort(index, kind="stable")
        self.index = index[order]
        self.values = np.hstack([self.values, c.values])[:, order]
        self.mean = np.concatenate([self.mean, c.mean])[order]

    def keep(self, index: np.ndarray) -> None:
        pos = np.searchsorted(self.index, index)
        self.index, self.values, self.mean = self.index[pos], self.values[:, pos], self.mean[pos]


def _ids(problem: Problem, index: np.ndarray) -> list[str]:
    return [str(f) for f in problem.feature_ids(index)] if index.size else []


def iterate(
    problem: Problem,
    config: IterateConfig,
    *,
    session: RunSession | None = None,
    scheduler=None,
    progress=None,
    memory_budget: int | str | None = None,
    first: PassResult | None = None,
) -> IterativeResult:
    """Run the iterative workflow on a problem (the array-level core of `run`).

    Parameters
    ----------
    problem : Problem
    config : IterateConfig
    session : RunSession, optional
        With a run folder every pass is checkpointed there and every finished iteration recorded in
        the manifest; a rerun reuses finished passes and refits. Without one, all runs in memory.
    scheduler : optional
        Where the passes run (see `widescreen.engine.execute`).
    progress : callable(pass name) -> callable(done, total), optional
    memory_budget : int or str, optional
    first : PassResult, optional
        The marginal screen of this problem already run (a trait's view of a pass shared by several
        traits, with its top list's values): used instead of a first pass of its own. Ignored with
        ``split`` and the permutation threshold, which need passes of their own.
    """
    n, p = problem.n, problem.source.n_features
    config.filters.check(problem.source.value_kind)
    d = shortlist_size(config.shortlist, n, p, memory_budget)
    capped = shortlist_notice(config.shortlist, n, memory_budget)
    capped = capped if capped is not None and capped["size"] == d else None
    ctx = StepContext(
        problem,
        config.rule,
        config.filters,
        config.sub_block,
        session.run if session is not None else None,
        split_halves(n, config.seed) if config.split else None,
        scheduler,
        progress,
        memory_budget,
        None if config.split or config.rule.kind == "permutation" else first,
    )
    loop = _Loop(
        pool=_Pool(n),
        old=list(session.manifest.get("iterations", [])) if session is not None else [],
        n_screened=p,
        memory_budget=memory_budget,
    )
    for k in range(config.max_iter + 1):
        stop = _iteration(ctx, config, session, loop, k, d)
        if stop is not None:
            loop.stop = stop
            break
    result = _result(ctx, loop, d)
    warn = budget_warning(config.fit, result.index.size, d)
    result.warnings = [warn] if warn else []
    if capped is not None:
        result.warnings.insert(0, capped["notice"])
    if session is not None:
        if capped is not None:
            session.manifest["shortlist_cap"] = capped
        session.manifest["iterations"] = loop.records
        session.manifest["stop_reason"] = loop.stop
        session.manifest["warnings"] = result.warnings
        session.save()
    return result


@dataclass
class _Loop:
    """The state of the iteration between its steps."""

    pool: _Pool
    old: list[dict]  # the iteration records of an earlier session (resume)
    n_screened: int
    records: list[dict] = field(default_factory=list)
    model: FittedModel | None = None
    entered_at: dict[int, int] = field(default_factory=dict)
    seen: list[tuple[int, ...]] = field(default_factory=list)
    screen_passes: list[PassResult] = field(default_factory=list)
    stop: str = "iteration limit"
    memory_budget: int | str | None = None  # the refit is refused when its values cannot fit

    @property
    def selected(self) -> np.ndarray:
        return self.model.index if self.model is not None else np.empty(0, dtype=np.int64)

    def previous(self, k: int) -> dict | None:
        return self.old[k] if k < len(self.old) else None


def _iteration(
    ctx: StepContext,
    config: IterateConfig,
    session: RunSession | None,
    loop: _Loop,
    k: int,
    d: int,
) -> str | None:
    """Iteration ``k``: screen (conditionally on the model when k > 0), refit; the stop reason or None."""
    selected = loop.selected
    budget = d - selected.size
    if budget <= 0:
        return "size budget reached"
    try:
        cands = _screen(ctx, config, session, loop, k, budget)
    except ConditioningError as exc:
        return f"cannot condition on the selected set: {exc}"
    if k > 0 and cands.index.size == 0:
        _keep_model(ctx.problem, loop, k, cands)
        return "no new candidates"
    new = _refit(ctx.problem, config, session, loop, k, cands)
    for j in np.setdiff1d(new.index, selected).tolist():
        loop.entered_at[j] = k
    loop.pool.keep(new.index)
    loop.model = new
    return _stop_after_fit(loop, k, new, selected)


def _screen(
    ctx: StepContext,
    config: IterateConfig,
    session: RunSession | None,
    loop: _Loop,
    k: int,
    budget: int,
) -> Candidates:
    """The step's pass(es), conditioned as the family says on the current model; recorded."""
    problem, model = ctx.problem, loop.model
    eta = (
        model.linear_predictor(loop.pool.values, problem.covariates)
        if model is not None and problem.family.conditioning in ("offset", "score")
        else None
    )
    cands = screen_step(ctx, k, budget, loop.selected, loop.pool.values, eta, config.seed)
    if k == 0:
        loop.screen_passes = cands.passes
        loop.n_screened = int(min(r.n_features - r.n_filtered for r in cands.passes))
    for r in cands.passes:
        if session is not None:
            session.record_pass(r.name, r.summary())
    return cands


def _keep_model(problem: Problem, loop: _Loop, k: int, cands: Candidates) -> None:
    """No new candidate: the iteration ends with the model it has (recorded without a refit)."""
    rec = _record(problem, k, cands, loop.model, loop.model, refit=False)
    prev = loop.previous(k)
    if prev is not None and not prev.get("refit", True) and prev["model"] == rec["model"]:
        rec = prev  # the same outcome as before: keep its timings
    loop.records.append(rec)


def _refit(
    problem: Problem,
    config: IterateConfig,
    session: RunSession | None,
    loop: _Loop,
    k: int,
    cands: Candidates,
) -> FittedModel:
    """Fit on the selected set plus the candidates, or reuse the same fit of an earlier session."""
    loop.pool.add(cands)
    token = fit_token(problem, loop.pool.index, config.fit, loop.n_screened)
    prev = loop.previous(k)
    if prev is not None and prev.get("fit_token") == token:
        new = FittedModel.from_record(prev["model"])
        rec = prev
    else:
        check_refit_memory(problem.n, loop.pool.index.size, loop.memory_budget)
        new = fit_union(problem, loop.pool.index, loop.pool.values, config.fit, loop.n_screened)
        rec = _record(problem, k, cands, new, loop.model)
        rec["fit_token"] = token
    loop.records.append(rec)
    if session is not None:
        session.manifest["iterations"] = loop.records + loop.old[k + 1 :]
        session.save()
    return new


def _stop_after_fit(loop: _Loop, k: int, new: FittedModel, selected: np.ndarray) -> str | None:
    if new.index.size == 0:
        return "empty model"  # conditioning on nothing would only repeat the screen
    if k > 0 and np.array_equal(new.index, selected):
        return "converged"
    key = tuple(new.index.tolist())
    if k > 0 and key in loop.seen:
        return "cycle"
    loop.seen.append(key)
    return None


def _result(ctx: StepContext, loop: _Loop, d: int) -> IterativeResult:
    problem, model, pool = ctx.problem, loop.model, loop.pool
    assert model is not None
    marginal = _marginal(ctx, loop.screen_passes, model.index)
    entered = np.array([loop.entered_at[j] for j in model.index.tolist()], dtype=np.int64)
    return IterativeResult(
        index=model.index,
        feature_ids=problem.feature_ids(model.index),
        coef=model.coef,
        intercept=float(model.intercept - model.coef @ pool.mean),
        covariate_coef=model.covariate_coef,
        mean=pool.mean,
        entered=entered,
        marginal=marginal,
        iterations=loop.records,
        stop_reason=loop.stop,
        budget=d,
        n_screened=loop.n_screened,
        model=model,
        screen=loop.screen_passes,
        problem=problem,
        run=ctx.run,
        refit=final_refit(problem, pool.values + pool.mean),
    )


def _record(
    problem: Problem,
    k: int,
    cands: Candidates,
    new: FittedModel,
    prev: FittedModel | None,
    *,
    refit: bool = True,
) -> dict:
    """The manifest record of iteration ``k`` (what entered and left relative to ``prev``)."""
    before = prev.index if prev is not None else np.empty(0, dtype=np.int64)
    entered = np.setdiff1d(new.index, before)
    left = np.setdiff1d(before, new.index)
    return IterationRecord(
        iteration=k,
        passes=tuple(r.name for r in cands.passes),
        threshold=tuple(cands.threshold),
        n_candidates=int(cands.index.size),
        candidates=cands.index,
        entered=tuple(_ids(problem, entered)),
        left=tuple(_ids(problem, left)),
        selected_size=int(new.index.size),
        pass_seconds=round(cands.seconds, 3),
        refit=refit,
        model=FitRecord.from_dict(new.record()),
    ).to_dict()


def _marginal(ctx: StepContext, passes: list[PassResult], index: np.ndarray) -> dict:
    """Marginal statistics (all analysed samples) of the selected features."""
    fam = ctx.problem.family
    cols = [c for c in fam.columns] + ["missing_rate"]
    if ctx.halves is None:
        s = stats_at(ctx.run, passes[0], index)
        return {c: np.asarray(s[c], dtype=np.float64) for c in cols}
    # After splitting no pass saw all samples: score the few selected columns with the kernel, in a
    # response state made by the pass builder for all samples (with the family's pre-passes).
    raw = read_columns(ctx.problem.source, index, kind="raw")
    block = prepare_block(raw, 0, ctx.problem.rows)
    state = ctx.passes.spec("marginal", keep=max(1, index.size), keep_values=False).state
    out = fam.kernel(block, state)
    s = {c: np.asarray(out[c], dtype=np.float64) for c in fam.columns}
    s["missing_rate"] = np.asarray(block.missing_rate, dtype=np.float64)
    return s


__all__ = ["IterateConfig", "IterativeResult", "iterate"]
