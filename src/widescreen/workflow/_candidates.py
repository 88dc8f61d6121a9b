"""One screening step of the iterative workflow: a pass (or one per half), cut by a threshold.

The first step ranks every feature marginally; a later step ranks the features outside the selected set
M conditionally on it, the family's way: a ``"columns"`` family gets the selected columns' values as
``conditioning`` (for the linear model: the partial correlation of x_j and y given the covariates and
M), an ``"offset"`` family gets the current model's linear predictor as ``offset`` (Fan, Samworth &
Wu 2009). Each pass keeps the top ``budget`` features with their values, so the refit needs no second
read (except after sample splitting, see `_split`).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..engine import FeatureFilter, PassResult, RunFolder, read_columns, read_stats
from ..schema import read_stats_at
from ._passes import PassContext
from ._problem import Problem
from ._split import intersect_ranked
from ._thresholds import ThresholdRule, bh_cutoff_blocks, bonferroni_cutoff, permutation_cutoff


class ConditioningError(ValueError):
    """The family cannot condition on the current model (its message says why)."""


@dataclass(frozen=True)
class StepContext:
    """What every pass of one run shares.

    Attributes
    ----------
    problem : Problem
    rule : ThresholdRule
    filters : FeatureFilter
    sub_block : int
    run : RunFolder or None
        Without one, passes keep their statistics in memory.
    halves : pair of ndarray of int, or None
        Positions (among the analysed samples) of the two halves when splitting.
    scheduler : optional
    progress : callable(pass name) -> callable(done, total) or None, optional
    memory_budget : int or str, optional
        Memory the passes may use (see `widescreen.engine.plan_memory`).
    first : PassResult, optional
        The marginal screen, already run (several traits share one pass over the store): the first
        step uses it instead of running its own pass. Its top list carries the values.
    """

    problem: Problem
    rule: ThresholdRule
    filters: FeatureFilter
    sub_block: int
    run: RunFolder | None = None
    halves: tuple[np.ndarray, np.ndarray] | None = None
    scheduler: Any = None
    progress: Callable[[str], Any] | None = None
    memory_budget: int | str | None = None
    first: PassResult | None = None
    passes: PassContext = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        # The one pass builder of the run; it holds the pre-pass results shared by its passes.
        passes = PassContext(
            self.problem,
            filters=self.filters,
            sub_block=self.sub_block,
            run=self.run,
            scheduler=self.scheduler,
            progress=self.progress,
            memory_budget=self.memory_budget,
        )
        object.__setattr__(self, "passes", passes)


@dataclass
class Candidates:
    """Features a step puts forward, strongest first.

    Attributes
    ----------
    index : ndarray of int of shape (m,)
    score : ndarray of shape (m,)
        The pass score (after splitting: the smaller of the two halves' scores).
    values : ndarray of shape (n, m)
        Imputed, centred values on all analysed samples.
    mean : ndarray of shape (m,)
        The imputation means (observed means over the analysed samples).
    passes : list of PassResult
    threshold : list of dict
        Per pass: the rule, its cutoff, the number of features tested and kept.
    """

    index: np.ndarray
    score: np.ndarray
    values: np.ndarray
    mean: np.ndarray
    passes: list[PassResult] = field(default_factory=list)
    threshold: list[dict] = field(default_factory=list)

    @property
    def seconds(self) -> float:
        return float(sum(p.seconds for p in self.passes))


def pass_seed(seed: int, iteration: int, half: int) -> int:
    """Seed of the permutations of one pass, derived from the run's seed (independent across passes)."""
    return int(np.random.SeedSequence([int(seed), int(iteration), int(half)]).generate_state(1)[0])


#: Largest n x d float64 block of candidate values (bytes) a pass carries through its merges. Above
#: it the pass keeps indices only and the candidates' columns are read afterwards (`read_columns`,
#: the same values): every block and merge would otherwise copy n x d values, which at n = 10,000,
#: d = 1085 made the pass 20x slower than the kernels (89 ns a value against 4).
KEEP_VALUES_BYTES = 64 * 2**20


def _one_pass(
    ctx: StepContext,
    name: str,
    sel: np.ndarray | None,
    budget: int,
    exclude: np.ndarray,
    conditioning: np.ndarray | None,
    offset: np.ndarray | None,
    seed: int,
    keep_values: bool,
) -> tuple[PassResult, np.ndarray, dict]:
    fam = ctx.problem.family
    conditional = exclude.size > 0
    if ctx.first is not None and name == "screen" and sel is None and not conditional:
        kept, info = apply_threshold(ctx, ctx.first, exclude)
        return ctx.first, kept, info
    try:
        spec = ctx.passes.spec(
            name,
            keep=budget,
            sel=sel,
            exclude=exclude,
            conditioning=conditioning
            if conditional and fam.conditioning in ("columns", "score")
            else None,
            offset=offset if conditional and fam.conditioning in ("offset", "score") else None,
            n_permutations=ctx.rule.permutations,
            seed=seed,
            keep_values=keep_values,
        )
    except ValueError as exc:
        if not conditional:
            raise
        # The current model leaves nothing to condition on (no variation left, separation, too
        # few samples for the selected columns): the iteration ends here, with the model it has.
        raise ConditioningError(str(exc)) from exc
    result = ctx.passes.run_spec(spec)
    kept, info = apply_threshold(ctx, result, exclude)
    return result, kept, info


def stats_at(run: RunFolder | None, result: PassResult, index: np.ndarray) -> dict[str, np.ndarray]:
    """Every recorded statistic of a pass at the given features (from memory or the run folder)."""
    if run is None:
        return {c: v[index] for c, v in (result.stats or {}).items()}
    return read_stats_at(run, result.name, np.asarray(index, dtype=np.int64))


def _p_value_blocks(
    run: RunFolder | None, result: PassResult, exclude: np.ndarray, step: int
) -> Callable[[], Iterator[np.ndarray]]:
    """A fresh read, block by block, of the p-values of the features a pass tested."""

    def tested(p, filtered, start):
        ok = filtered == 0
        if exclude.size:
            ok &= ~np.isin(np.arange(start, start + p.size), exclude)
        return p[ok]

    def blocks():
        if run is None:
            s = result.stats or {}
            yield tested(s["p_value"], s["filtered"], 0)
            return
        for start in range(0, result.n_features, step):
            stop = min(start + step, result.n_features)
            s = read_stats(run, result.name, ("p_value", "filtered"), start, stop)
            yield tested(s["p_value"], s["filtered"], start)

    return blocks


def pass_lambda_gc(
    problem: Problem, run: RunFolder | None, result: PassResult, exclude: np.ndarray
) -> float | None:
    """Genomic inflation factor lambda_GC of a pass's tested features (None without p-values).

    median(chi2.isf(p, 1)) / 0.4549 (common practice; `widescreen.report.lambda_gc`): about 1 when the
    test is calibrated and most features are null, above 1 under inflation (for example overdispersed
    counts under a plain Poisson test, or confounding the covariates do not remove).
    """
    if not problem.family.has_p_values:
        return None
    from ..report._scan import Chunk, RankSelector
    from ..report._stats import lambda_from_middle

    width = problem.source.block_width
    step = width * max(1, (1 << 18) // width)
    blocks = _p_value_blocks(run, result, exclude, step)
    # The median by exact order statistics over the blocks (a few passes, a 65,536-bin histogram):
    # memory flat in p, where the p-values of ten million features would take 80 MB at once.
    rank = RankSelector("p_value")
    while rank.wants_pass():
        merged = None
        for p in blocks():
            rec = rank.part(Chunk(0, p.size, {"p_value": p}, np.ones(p.size, dtype=bool)))
            merged = rec if merged is None else rank.combine([merged, rec])
        rank.end_pass(merged)
    return round(lambda_from_middle(*rank.values), 6) if rank.count else None


def _finite(v: float) -> float | None:
    """A cutoff as the manifest records it: None when nothing can pass (plain JSON has no inf)."""
    return float(v) if np.isfinite(v) else None


def apply_threshold(
    ctx: StepContext, result: PassResult, exclude: np.ndarray
) -> tuple[np.ndarray, dict]:
    """Positions in the pass's top-k list that the threshold keeps, and a record of the cut."""
    rule, top = ctx.rule, result.topk
    n_tested = int(result.n_features - result.n_filtered - exclude.size)
    info: dict[str, Any] = {"pass": result.name, "rule": rule.kind, "n_tested": n_tested}
    keep = np.ones(top.index.size, dtype=bool)
    if rule.kind == "permutation":
        if top.null_max.size == 0:
            raise ValueError(
                f"the {ctx.problem.family.name} family does not score permuted responses; "
                "choose another threshold"
            )
        cutoff = permutation_cutoff(top.null_max, rule.alpha)
        keep = top.score > cutoff
        info["cutoff_score"] = _finite(cutoff)
    elif rule.needs_p_values:
        if not ctx.problem.family.has_p_values:
            raise ValueError(
                f"the {ctx.problem.family.name} family has no p-values; choose another threshold"
            )
        if rule.kind == "bonferroni":
            cutoff = bonferroni_cutoff(n_tested, rule.alpha)
        else:
            width = ctx.problem.source.block_width
            step = width * max(1, (1 << 18) // width)
            cutoff, m = bh_cutoff_blocks(
                _p_value_blocks(ctx.run, result, exclude, step), rule.alpha
            )
            info["n_tested"] = m
        p = stats_at(ctx.run, result, top.index)["p_value"]
        keep = p <= cutoff
        info["cutoff_p_value"] = _finite(cutoff)
    kept = np.flatnonzero(keep)
    info["n_kept"] = int(kept.size)
    info["lambda_gc"] = pass_lambda_gc(ctx.problem, ctx.run, result, exclude)
    return kept, info


def _score_of(top, index: np.ndarray) -> np.ndarray:
    """Scores of the given features, all on the top-k list ``top``."""
    order = np.argsort(top.index)
    return top.score[order[np.searchsorted(top.index[order], index)]]


def screen_step(
    ctx: StepContext,
    iteration: int,
    budget: int,
    selected: np.ndarray,
    selected_values: np.ndarray | None,
    eta: np.ndarray | None,
    seed: int,
) -> Candidates:
    """Run the step's pass(es) over every feature outside ``selected``; return the candidates.

    Parameters
    ----------
    ctx : StepContext
    iteration : int
        0 for the marginal screen ("screen"), k for the k-th conditional pass ("iterK").
    budget : int
        Candidates kept at most (d - |selected|).
    selected : ndarray of int of shape (s,)
        Store indices of the current selected set (excluded from the ranking).
    selected_values : ndarray of shape (n, s), optional
        Their imputed, centred values ("columns" families).
    eta : ndarray of shape (n,), optional
        The current model's linear predictor ("offset" families).
    seed : int
        The run's seed; each pass's permutations get their own seed derived from it.
    """
    name = "screen" if iteration == 0 else f"iter{iteration}"
    exclude = np.sort(np.asarray(selected, dtype=np.int64))
    if ctx.halves is None:
        carry = 8 * ctx.problem.n * budget <= KEEP_VALUES_BYTES
        result, kept, info = _one_pass(
            ctx,
            name,
            None,
            budget,
            exclude,
            selected_values,
            eta,
            pass_seed(seed, iteration, 0),
            carry,
        )
        top = result.topk
        index = top.index[kept]
        if not carry:
            prep = read_columns(
                ctx.problem.source, index, rows=ctx.problem.rows, sub_block=ctx.sub_block
            )
            return Candidates(index, top.score[kept], prep.values, prep.mean, [result], [info])
        mean = stats_at(ctx.run, result, index)["mean"]
        values = top.values[:, kept] if top.values is not None else np.empty((ctx.problem.n, 0))
        return Candidates(index, top.score[kept], values, mean, [result], [info])
    passes, infos, lists = [], [], []
    for h, sel in enumerate(ctx.halves):
        result, kept, info = _one_pass(
            ctx,
            f"{name}_{'ab'[h]}",
            sel,
            budget,
            exclude,
            selected_values,
            eta,
            pass_seed(seed, iteration, h + 1),
            False,
        )
        passes.append(result)
        infos.append(info)
        lists.append(result.topk.index[kept])
    index = intersect_ranked(lists[0], lists[1])
    score = np.minimum(*(_score_of(r.topk, index) for r in passes))
    prep = read_columns(ctx.problem.source, index, rows=ctx.problem.rows, sub_block=ctx.sub_block)
    return Candidates(index, score, prep.values, prep.mean, passes, infos)


__all__ = [
    "Candidates",
    "ConditioningError",
    "StepContext",
    "apply_threshold",
    "pass_seed",
    "screen_step",
    "stats_at",
]
