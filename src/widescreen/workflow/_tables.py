"""The tables of a run folder, built from a workflow's results to the schemas of `widescreen.schema`.

``ranking.tsv`` (screen and run), ``model.tsv``, ``iterations.tsv`` and ``entries.tsv`` (run). Every
column, its dtype and meaning is in `widescreen.schema` (and the README); this module only gathers the
values.
"""

from __future__ import annotations

import numpy as np

from ..schema import (
    CV,
    ENTRIES,
    ITERATIONS,
    MODEL,
    RANKING,
    STABILITY,
    FitRecord,
    IterationRecord,
    ModelRecord,
    format_table,
    read_stats_at,
    statistic_columns,
)
from ._problem import Problem

#: Extension point: further `model.tsv` columns of the fit (`widescreen.schema.FIT_SLOT`), as
#: (Column, function of the IterativeResult giving the whole column: intercept and covariate rows, then
#: the selected features in store-index order, like ``result.coef``).
MODEL_FIT_COLUMNS: tuple = ()


def _annotations(problem: Problem, index: np.ndarray) -> tuple[list, list]:
    """Chromosome and position of the given features (None where the store has no annotations)."""
    ds = getattr(problem.source, "dataset", None)
    ann = ds.annotations_at(index) if ds is not None else None
    if ann is None:
        return [None] * index.size, [None] * index.size
    return [str(c) for c in ann["chrom"]], [int(p) for p in ann["pos"]]


def _allele_freq(problem: Problem, mean: np.ndarray) -> np.ndarray:
    if problem.source.value_kind == "dosage":
        return np.asarray(mean, dtype=np.float64) / 2.0
    return np.full(np.shape(mean), np.nan)


def ranking_columns(
    problem: Problem,
    stats: dict[str, np.ndarray],
    index: np.ndarray,
    score: np.ndarray,
    shortlisted: np.ndarray,
    frequency: np.ndarray | None = None,
) -> dict[str, object]:
    """The columns of ``ranking.tsv`` for the given features, strongest first.

    Parameters
    ----------
    problem : Problem
    stats : dict of str -> ndarray of shape (k,)
        The pass's statistics at ``index`` (every family column, ``missing_rate`` and ``mean``).
    index : ndarray of int of shape (k,)
    score : ndarray of shape (k,)
    shortlisted : ndarray of bool of shape (k,)
    frequency : ndarray of shape (k,), optional
        Selection frequencies (stability selection); NA without them.
    """
    fam = problem.family
    chrom, pos = _annotations(problem, index)
    cols: dict[str, object] = {
        "feature": problem.feature_ids(index),
        "rank": np.arange(1, index.size + 1),
        "score": score,
    }
    for c in statistic_columns(fam.columns):
        cols[c.name] = stats[c.name]
    cols.update(
        missing_rate=stats["missing_rate"],
        mean=stats["mean"],
        allele_freq=_allele_freq(problem, stats["mean"]),
        chrom=chrom,
        pos=pos,
        index=index,
        shortlisted=np.asarray(shortlisted, dtype=bool),
        selection_frequency=np.full(index.size, np.nan) if frequency is None else frequency,
    )
    return cols


def ranking_text(
    problem: Problem,
    run,
    pass_result,
    index: np.ndarray,
    score: np.ndarray,
    shortlisted: np.ndarray,
    frequency: np.ndarray | None = None,
) -> str:
    """``ranking.tsv`` of a pass (statistics from the run folder, or in memory without one)."""
    if run is not None:
        stats = read_stats_at(run, pass_result.name, index)
    else:
        stats = {c: v[index] for c, v in pass_result.stats.items()}
    cols = ranking_columns(problem, stats, index, score, shortlisted, frequency)
    return format_table(RANKING, cols, statistics=statistic_columns(problem.family.columns))


def model_record(result) -> ModelRecord:
    """The final model as the manifest records it (``model``): the numbers of model.tsv."""
    problem = result.problem
    order = model_order(result)
    return ModelRecord(
        features=tuple(str(f) for f in result.feature_ids[order]),
        index=result.index[order],
        coefficient=result.coef[order],
        entered=result.entered[order],
        intercept=float(result.intercept) if problem.family.intercept else None,
        covariates=tuple(problem.covariate_names),
        covariate_coef=np.asarray(result.covariate_coef, dtype=np.float64),
        stop_reason=result.stop_reason,
    )


def model_order(result) -> np.ndarray:
    """Selected features in model.tsv's order: earliest entry first, then strongest, then by index."""
    return np.lexsort((result.index, -result.marginal["score"], result.entered))


def model_columns(result) -> dict[str, object]:
    """Columns of ``model.tsv``: intercept and covariate rows first, then the selected features."""
    problem = result.problem
    order = model_order(result)
    # A model without an intercept (the Cox partial likelihood) gets no row for it.
    no_intercept = not problem.family.intercept
    head = ([] if no_intercept else ["(intercept)"]) + [
        f"covariate:{c}" for c in problem.covariate_names
    ]
    terms = ([] if no_intercept else ["intercept"]) + ["covariate"] * len(problem.covariate_names)
    h = len(head)
    na = [None] * h
    nan = [float("nan")] * h
    index = result.index[order]
    chrom, pos = _annotations(problem, index)
    mean = result.mean[order]
    cols: dict[str, object] = {
        "feature": head + [str(f) for f in result.feature_ids[order]],
        "term": terms + ["feature"] * index.size,
        "coefficient": [
            *([] if no_intercept else [result.intercept]),
            *np.asarray(result.covariate_coef).tolist(),
            *result.coef[order].tolist(),
        ],
    }
    fit = getattr(result, "refit", None)  # the unpenalised refit of the final model, if made
    if fit is None:
        cols["refit_coefficient"] = [float("nan")] * (h + index.size)
        cols["refit_se"] = [float("nan")] * (h + index.size)
    else:
        cols["refit_coefficient"] = [
            *([] if no_intercept else [fit.intercept]),
            *np.asarray(fit.unpenalized_coef).tolist(),
            *np.asarray(fit.coef)[order].tolist(),
        ]
        cols["refit_se"] = [
            *([] if no_intercept else [fit.intercept_se]),
            *np.asarray(fit.unpenalized_se).tolist(),
            *np.asarray(fit.se)[order].tolist(),
        ]
    for col, values in MODEL_FIT_COLUMNS:
        v = list(values(result))
        cols[col.name] = v[:h] + list(np.asarray(v[h:])[order])
    stab = getattr(result, "extra", {}).get("stability")
    freq = stab.frequency_of(index) if stab is not None else np.full(index.size, np.nan)
    cols["selection_frequency"] = nan + freq.tolist()
    cols["entered"] = na + result.entered[order].tolist()
    cols["score"] = nan + result.marginal["score"][order].tolist()
    for c in statistic_columns(problem.family.columns):
        cols[c.name] = nan + result.marginal[c.name][order].tolist()
    cols["missing_rate"] = nan + result.marginal["missing_rate"][order].tolist()
    cols["mean"] = nan + mean.tolist()
    cols["allele_freq"] = nan + _allele_freq(problem, mean).tolist()
    cols["chrom"] = na + chrom
    cols["pos"] = na + pos
    cols["index"] = na + index.tolist()
    return cols


def model_text(result) -> str:
    return format_table(
        MODEL,
        model_columns(result),
        statistics=statistic_columns(result.problem.family.columns),
        fit=tuple(c for c, _ in MODEL_FIT_COLUMNS),
    )


def iterations_columns(records: list[IterationRecord], criterion: str) -> dict[str, list]:
    """Columns of ``iterations.tsv``, one row per iteration."""
    return {
        "iteration": [r.iteration for r in records],
        "passes": [",".join(r.passes) for r in records],
        "candidates": [r.n_candidates for r in records],
        "entered": [len(r.entered) for r in records],
        "left": [len(r.left) for r in records],
        "selected": [r.selected_size for r in records],
        "refit": [r.refit for r in records],
        "criterion": [criterion if r.refit else None for r in records],
        "criterion_value": [r.model.criterion_value for r in records],
        "lambda": [float("nan") if r.model.lambda_ is None else r.model.lambda_ for r in records],
        "pass_seconds": [r.pass_seconds for r in records],
        "fit_seconds": [r.model.seconds if r.refit else 0.0 for r in records],
    }


def iterations_text(records: list[IterationRecord], criterion: str) -> str:
    return format_table(ITERATIONS, iterations_columns(records, criterion))


def entries_columns(problem: Problem, records: list[IterationRecord]) -> dict[str, list]:
    """Columns of ``entries.tsv``: every feature that entered or left the selected set, by iteration.

    Worked out from consecutive fits (their selected store indices), so it needs nothing but the
    iteration records.
    """
    cols: dict[str, list] = {
        k: [] for k in ("iteration", "event", "feature", "index", "coefficient")
    }
    before = np.empty(0, dtype=np.int64)
    for r in records:
        fit: FitRecord = r.model
        now = np.sort(fit.index)
        for event, idx in (
            ("entered", np.setdiff1d(now, before)),
            ("left", np.setdiff1d(before, now)),
        ):
            if not idx.size:
                continue
            cols["iteration"] += [r.iteration] * idx.size
            cols["event"] += [event] * idx.size
            cols["feature"] += [str(f) for f in problem.feature_ids(idx)]
            cols["index"] += idx.tolist()
            cols["coefficient"] += fit.coefficient_of(idx).tolist()
        before = now
    return cols


def entries_text(problem: Problem, records: list[IterationRecord]) -> str:
    return format_table(ENTRIES, entries_columns(problem, records))


def stability_text(problem: Problem, stab, in_model: np.ndarray) -> str:
    """``stability.tsv``: every feature selected in some half, most frequent first (then by index)."""
    order = np.lexsort((stab.index, -stab.frequency))
    index, freq = stab.index[order], stab.frequency[order]
    return format_table(
        STABILITY,
        {
            "feature": problem.feature_ids(index),
            "rank": np.arange(1, index.size + 1),
            "selection_frequency": freq,
            "stable": freq >= stab.threshold - 1e-12,
            "in_model": np.isin(index, in_model),
            "index": index,
        },
    )


def cv_text(cv) -> str:
    """``cv.tsv``: one row per fold; the metrics that are not the family's are NA."""
    rows = cv.folds
    cols: dict[str, list] = {
        c: [r[c] for r in rows] for c in ("fold", "n_train", "n_test", "selected")
    }
    for m in ("r2", "auc", "deviance", "concordance"):
        cols[m] = [r.get(m, float("nan")) for r in rows]
    return format_table(CV, cols)


__all__ = [
    "MODEL_FIT_COLUMNS",
    "cv_text",
    "entries_columns",
    "entries_text",
    "iterations_columns",
    "iterations_text",
    "model_columns",
    "model_record",
    "model_text",
    "ranking_columns",
    "ranking_text",
    "stability_text",
]
