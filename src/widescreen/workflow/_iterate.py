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

from ..engine import FeatureFilter, PassResult, RunFolder
from ..fit import make_penalty
from ..store._reader import prepare_block
from ._candidates import Candidates, ConditioningError, StepContext, screen_step, stats_at
from ._problem import Problem, shortlist_size
from ._refit import FitSettings, FittedModel, fit_token, fit_union
from ._session import RunSession
from ._split import read_raw_columns, split_halves
from ._thresholds import ThresholdRule

CRITERIA = ("ebic", "bic", "cv")


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

    def __post_init__(self) -> None:
        make_penalty(self.penalty)  # a clear error for an unknown penalty name
        if self.criterion not in CRITERIA:
            raise ValueError(f"The 'criterion' must be one of {CRITERIA}; got {self.criterion!r}.")
        for name in ("max_iter", "seed"):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, int | np.integer) or v < 0:
                raise ValueError(f"The '{name}' must be a non-negative integer; got {v!r}.")
        if isinstance(self.shortlist, str) and self.shortlist != "auto":
            raise ValueError(
                f"The 'shortlist' must be a positive integer or 'auto'; got {self.shortlist!r}."
            )
        _ = self.rule  # validates threshold, alpha and n_permutations

    @property
    def rule(self) -> ThresholdRule:
        return ThresholdRule(self.threshold, float(self.alpha), int(self.n_permutations))

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
) -> IterativeResult:
    """Run the iterative workflow on a loaded problem.

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
    """
    n, p = problem.n, problem.source.n_features
    d = shortlist_size(config.shortlist, n, p)
    run = session.run if session is not None else None
    halves = split_halves(n, config.seed) if config.split else None
    ctx = StepContext(
        problem,
        config.rule,
        config.filters,
        config.sub_block,
        run,
        halves,
        scheduler,
        progress,
        memory_budget,
    )
    old = list(session.manifest.get("iterations", [])) if session is not None else []
    records: list[dict] = []
    pool = _Pool(n)
    model: FittedModel | None = None
    entered_at: dict[int, int] = {}
    seen: list[tuple[int, ...]] = []
    screen_passes: list[PassResult] = []
    n_screened = p
    stop = "iteration limit"
    for k in range(config.max_iter + 1):
        selected = model.index if model is not None else np.empty(0, dtype=np.int64)
        budget = d - selected.size
        if budget <= 0:
            stop = "size budget reached"
            break
        eta = (
            model.linear_predictor(pool.values, problem.covariates)
            if model is not None and problem.family.conditioning in ("offset", "score")
            else None
        )
        try:
            cands = screen_step(ctx, k, budget, selected, pool.values, eta, config.seed)
        except ConditioningError as exc:
            stop = f"cannot condition on the selected set: {exc}"
            break
        if k == 0:
            screen_passes = cands.passes
            n_screened = int(min(r.n_features - r.n_filtered for r in cands.passes))
        for r in cands.passes:
            if session is not None:
                session.record_pass(r.name, r.summary())
        if k > 0 and cands.index.size == 0:
            rec = _record(problem, k, cands, model, model, refit=False)
            prev = old[k] if k < len(old) else None
            if prev is not None and not prev.get("refit", True) and prev["model"] == rec["model"]:
                rec = prev  # the same outcome as before: keep its timings
            records.append(rec)
            stop = "no new candidates"
            break
        pool.add(cands)
        token = fit_token(problem, pool.index, config.fit, n_screened)
        prev = old[k] if k < len(old) else None
        if prev is not None and prev.get("fit_token") == token:
            new = FittedModel.from_record(prev["model"])
            rec = prev
        else:
            new = fit_union(problem, pool.index, pool.values, config.fit, n_screened)
            rec = _record(problem, k, cands, new, model)
            rec["fit_token"] = token
        records.append(rec)
        if session is not None:
            session.manifest["iterations"] = records + old[k + 1 :]
            session.save()
        for j in np.setdiff1d(new.index, selected).tolist():
            entered_at[j] = k
        pool.keep(new.index)
        model = new
        key = tuple(new.index.tolist())
        if new.index.size == 0:
            stop = "empty model"  # conditioning on nothing would only repeat the screen
            break
        if k > 0 and np.array_equal(new.index, selected):
            stop = "converged"
            break
        if k > 0 and key in seen:
            stop = "cycle"
            break
        seen.append(key)
    assert model is not None
    if session is not None:
        session.manifest["iterations"] = records
        session.manifest["stop_reason"] = stop
        session.save()
    marginal = _marginal(ctx, screen_passes, model.index)
    entered = np.array([entered_at[j] for j in model.index.tolist()], dtype=np.int64)
    return IterativeResult(
        index=model.index,
        feature_ids=problem.feature_ids(model.index),
        coef=model.coef,
        intercept=float(model.intercept - model.coef @ pool.mean),
        covariate_coef=model.covariate_coef,
        mean=pool.mean,
        entered=entered,
        marginal=marginal,
        iterations=records,
        stop_reason=stop,
        budget=d,
        n_screened=n_screened,
        model=model,
        screen=screen_passes,
        problem=problem,
        run=run,
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
    return {
        "iteration": k,
        "passes": [r.name for r in cands.passes],
        "threshold": cands.threshold,
        "n_candidates": int(cands.index.size),
        "candidates": cands.index.tolist(),
        "entered": _ids(problem, entered),
        "left": _ids(problem, left),
        "selected_size": int(new.index.size),
        "pass_seconds": round(cands.seconds, 3),
        "refit": refit,
        "model": new.record(),
    }


def _marginal(ctx: StepContext, passes: list[PassResult], index: np.ndarray) -> dict:
    """Marginal statistics (all analysed samples) of the selected features."""
    fam = ctx.problem.family
    cols = [c for c in fam.columns] + ["missing_rate"]
    if ctx.halves is None:
        s = stats_at(ctx.run, passes[0], index)
        return {c: np.asarray(s[c], dtype=np.float64) for c in cols}
    # After splitting no pass saw all samples: score the few selected columns with the kernel.
    raw = read_raw_columns(ctx.problem.source, index)
    block = prepare_block(raw, 0, ctx.problem.rows)
    state = fam.prepare(ctx.problem.response, ctx.problem.covariates)
    out = fam.kernel(block, state)
    s = {c: np.asarray(out[c], dtype=np.float64) for c in fam.columns}
    s["missing_rate"] = np.asarray(block.missing_rate, dtype=np.float64)
    return s


__all__ = ["IterateConfig", "IterativeResult", "iterate"]
