"""The screen -> refit pipeline on many subsets of the samples at once (stability halves, CV folds).

Three phases, each resumable from the manifest record it keeps per subset:

1. **Screen**: every subset's top ``d`` features. The subsets are the columns of a response matrix Y
   of shape (n, K) (NaN = the sample is not in that subset), screened by `screen_responses`: one pass
   over the store per group of subsets where the family has a response-matrix pass.
2. **Read**: the union of all the subsets' shortlists, once, on every analysed sample (float64 with
   NaN for a missing value; `widescreen.engine.read_columns`).
3. **Refit**: per subset, its shortlist's columns on its samples (missing values imputed with the
   subset's own means, then centred) and the run's penalised refit (`fit_union`, the same penalty,
   tuning and EBIC candidate count as the run's).

The rule per subset is the pipeline of ``run --max-iter 0``: one marginal screen and one refit. The
conditional passes of the iterative screen are not rerun per subset (each would be one more pass over
the store per subset and iteration); with ``--max-iter 0`` the frequencies and the cross-validated
accuracy describe exactly the pipeline that made the model, otherwise its first step and refit.
"""

from __future__ import annotations

import time
import warnings
from collections.abc import Callable, Iterator
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from ..engine import FeatureFilter, read_columns
from ._passes import PassContext
from ._problem import Problem
from ._refit import FitSettings, FittedModel, fit_union
from ._responses import screen_responses as multi_screen


@dataclass(frozen=True)
class SubsetScreen:
    """Where and how the subsets are screened (what every pass of the run shares).

    Attributes
    ----------
    problem : Problem
    filters : FeatureFilter
    sub_block : int
    scheduler, progress, memory_budget : optional
        As for `PassContext`.
    """

    problem: Problem
    filters: FeatureFilter
    sub_block: int = 1024
    scheduler: Any = None
    progress: Callable[[str], Any] | None = None
    memory_budget: int | str | None = None


def response_matrix(problem: Problem, masks: np.ndarray) -> np.ndarray:
    """Y of shape (n, K): the response where ``masks`` (n, K) is true, NaN elsewhere."""
    y = np.asarray(problem.response.y, dtype=np.float64)
    return np.where(masks, y[:, None], np.nan)


#: Memory for the in-memory statistics of one response-matrix pass (every feature x the group's
#: responses x about 8 columns of float64): the subsets are screened in groups that fit it.
STATS_BUDGET = 256 << 20


def group_size(n_features: int, K: int, budget: int = STATS_BUDGET) -> int:
    """Responses per response-matrix pass so that its statistics fit ``budget`` bytes."""
    return int(max(1, min(K, budget // max(1, n_features * 8 * 8))))


def screen_responses(
    where: SubsetScreen,
    Y: np.ndarray,
    *,
    shortlist: int,
    names: list[str],
    label: str = "subsets",
) -> Iterator[tuple[list[int], list[np.ndarray]]]:
    """Top ``shortlist`` features of each column of Y (strongest first), a group of columns at a time.

    Column k of Y is the problem's response on the samples where it is finite (NaN: not in the
    subset); the event indicator and the covariates are the problem's, restricted to those samples.
    Yields (the group's column numbers, their shortlists) after each pass, so the caller can record
    them (resume); a column the family cannot prepare on its samples yields `Skipped` instead of a
    shortlist. ``label`` names a response-matrix pass in the progress display ("LABEL 1-41 of
    100"); a single-response pass shows its column's name.

    Families with a response-matrix pass (`Family.multi_kernel`: linear, logistic, Poisson, Cox)
    screen a group of columns in one pass over the store (`widescreen.workflow.screen_responses`), as
    many columns per pass as `group_size` allows (the pass's statistics are kept in memory, not in the
    run folder); the GLM and Cox families rank the subsets by the score test there. The others (the
    model-free families) fall back to one single-response pass per column through the run's pass
    builder: each reads and decodes the store again.
    """
    problem = where.problem
    K = Y.shape[1]
    if problem.family.multi_kernel is not None:
        G = group_size(problem.n_features, K)
        for a in range(0, K, G):
            cols = list(range(a, min(a + G, K)))
            pass_name = f"{label} {a + 1}-{cols[-1] + 1} of {K}"
            try:
                found = multi_screen(
                    problem,
                    Y[:, cols],
                    shortlist=shortlist,
                    names=[names[k] for k in cols],
                    filters=where.filters,
                    sub_block=where.sub_block,
                    keep_values=False,
                    run=None,  # the subsets' statistics are not kept: only their shortlists
                    name=pass_name,
                    scheduler=where.scheduler,
                    # screen_responses takes the pass's own callable(done, total)
                    progress=None if where.progress is None else where.progress(pass_name),
                    memory_budget=where.memory_budget,
                )
            except ValueError:
                # A subset the family cannot prepare (for example covariates that separate a
                # binary outcome within it): screen the group one subset at a time, so only that
                # subset is skipped.
                for k in cols:
                    yield from _single_passes(where, Y, [k], shortlist, names)
                continue
            yield cols, [np.asarray(r.index, dtype=np.int64) for r in found]
        return
    yield from _single_passes(where, Y, list(range(K)), shortlist, names)


@dataclass(frozen=True)
class Skipped:
    """A subset that could not be screened or refitted, and why (the family's message)."""

    reason: str


def _single_passes(
    where: SubsetScreen, Y: np.ndarray, cols: list[int], shortlist: int, names: list[str]
) -> Iterator[tuple[list[int], list[np.ndarray | Skipped]]]:
    """One single-response pass per column of Y in ``cols``; a column the family cannot prepare is
    `Skipped`."""
    ctx = PassContext(
        where.problem,
        filters=where.filters,
        sub_block=where.sub_block,
        run=None,
        scheduler=where.scheduler,
        progress=where.progress,
        memory_budget=where.memory_budget,
    )
    for k in cols:
        sel = np.flatnonzero(np.isfinite(Y[:, k]))
        try:
            spec = ctx.spec(names[k], keep=shortlist, sel=sel, keep_values=False)
        except ValueError as exc:
            yield [k], [Skipped(str(exc))]
            continue
        result = ctx.run_spec(spec)
        yield [k], [np.asarray(result.topk.index[:shortlist], dtype=np.int64)]


def subproblem(problem: Problem, sel: np.ndarray) -> Problem:
    """The problem restricted to the analysed samples at positions ``sel`` (for a refit)."""
    Z = problem.covariates
    return replace(
        problem,
        response=problem.response.subset(sel),
        covariates=None if Z is None else Z[sel],
        rows=sel if problem.rows is None else problem.rows[sel],
        sample_ids=None if problem.sample_ids is None else problem.sample_ids[sel],
    )


def impute_centre(raw: np.ndarray, sel: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Columns of ``raw`` (n, m; NaN missing) on the rows ``sel``, imputed with their mean over those
    rows and centred; and the means (0 for a column missing on every row)."""
    sub = raw[sel]
    seen = np.isfinite(sub)
    count = seen.sum(axis=0)
    mean = np.where(seen, sub, 0.0).sum(axis=0) / np.maximum(count, 1)
    centred = np.where(seen, sub - mean, 0.0)
    return centred, mean


def centre_with(raw: np.ndarray, mean: np.ndarray) -> np.ndarray:
    """Columns centred by given means, missing values at the mean (centred: 0)."""
    return np.where(np.isfinite(raw), raw - mean, 0.0)


@dataclass
class SubsetFit:
    """The refit on one subset.

    Attributes
    ----------
    model : FittedModel
        Its ``index`` is the selected set (store indices, increasing).
    mean : ndarray of shape (k,)
        Imputation means of the selected features over the subset.
    """

    model: FittedModel
    mean: np.ndarray


def fit_subset(
    problem: Problem,
    sel: np.ndarray,
    shortlist: np.ndarray,
    union: np.ndarray,
    raw: np.ndarray,
    settings: FitSettings,
    n_candidates: int,
) -> SubsetFit:
    """The run's penalised refit on the samples ``sel`` and the features ``shortlist``.

    Parameters
    ----------
    problem : Problem
    sel : ndarray of int
        Positions among the analysed samples.
    shortlist : ndarray of int
        Store indices (any order).
    union : ndarray of int of shape (u,)
        Store indices of the columns of ``raw``, increasing.
    raw : ndarray of shape (n, u)
        Their values on every analysed sample (NaN missing).
    settings : FitSettings
    n_candidates : int
        Features screened (the EBIC's p).
    """
    idx = np.sort(np.asarray(shortlist, dtype=np.int64))
    pos = np.searchsorted(union, idx)
    values, mean = impute_centre(raw[:, pos], sel)
    with warnings.catch_warnings():
        # An ill-conditioned refit on one subset of many is not news (the subset's model says
        # what it found); the warning would repeat for every subset.
        warnings.filterwarnings("ignore", message="An ill-conditioned matrix")
        model = fit_union(subproblem(problem, sel), idx, values, settings, n_candidates)
    return SubsetFit(model=model, mean=mean[np.searchsorted(idx, model.index)])


#: What a refit on a subset may raise when the subset cannot be fitted (the subset is then skipped).
FIT_ERRORS = (ValueError, np.linalg.LinAlgError, FloatingPointError)


def read_union(problem: Problem, shortlists: list[np.ndarray], sub_block: int):
    """The union of the shortlists (increasing) and its values on every analysed sample (NaN missing)."""
    union = np.unique(np.concatenate(shortlists)) if shortlists else np.empty(0, dtype=np.int64)
    if union.size == 0:
        return union, np.empty((problem.n, 0))
    raw = read_columns(problem.source, union, rows=problem.rows, kind="float", sub_block=sub_block)
    return union, np.asarray(raw, dtype=np.float64)


def refit_progress(where: SubsetScreen, label: str, total: int) -> Callable[[], None]:
    """A counter of finished refits, shown through the run's progress display (``label``)."""
    show = where.progress(label) if where.progress is not None else None
    done = 0
    if show is not None:
        show(0, total)

    def tick() -> None:
        nonlocal done
        done += 1
        if show is not None:
            show(done, total)

    return tick


def screen_subsets(
    where: SubsetScreen,
    samples: list[np.ndarray],
    recs: list[dict],
    *,
    shortlist: int,
    names: list[str],
    label: str,
    save: Callable[[], None] | None = None,
) -> float | None:
    """Screen every subset whose record holds no ``shortlist`` yet; record each one's top list.

    ``samples[i]`` are the analysed-sample positions of subset ``i`` and ``recs[i]`` its manifest
    record, updated in place: ``shortlist`` (store indices, strongest first), or an empty one and an
    ``error`` for a subset the family cannot screen. The subsets share response-matrix passes
    (`screen_responses`); ``save`` is called after each group, so a resumed run redoes only the groups
    it had not finished. Returns the seconds spent, or None when nothing was left to screen.
    """
    todo = [i for i, r in enumerate(recs) if "shortlist" not in r]
    if not todo:
        return None
    masks = np.zeros((where.problem.n, len(todo)), dtype=bool)
    for j, i in enumerate(todo):
        masks[samples[i], j] = True
    t0 = time.perf_counter()
    groups = screen_responses(
        where,
        response_matrix(where.problem, masks),
        shortlist=shortlist,
        names=[names[i] for i in todo],
        label=label,
    )
    for cols, lists in groups:
        for j, top in zip(cols, lists, strict=True):
            if isinstance(top, Skipped):
                recs[todo[j]].update(shortlist=[], error=top.reason)
            else:
                recs[todo[j]]["shortlist"] = [int(v) for v in top]
        if save is not None:
            save()
    return time.perf_counter() - t0


def timed(fn, *args, **kwargs):
    """fn(*args, **kwargs) and its wall time in seconds."""
    t0 = time.perf_counter()
    out = fn(*args, **kwargs)
    return out, time.perf_counter() - t0


__all__ = [
    "FIT_ERRORS",
    "STATS_BUDGET",
    "Skipped",
    "SubsetFit",
    "SubsetScreen",
    "centre_with",
    "fit_subset",
    "group_size",
    "impute_centre",
    "read_union",
    "refit_progress",
    "response_matrix",
    "screen_responses",
    "screen_subsets",
    "subproblem",
    "timed",
]
