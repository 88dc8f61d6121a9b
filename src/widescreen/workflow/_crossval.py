"""Cross-validation of the whole pipeline, screening included (``run --cv-folds K``).

The samples are dealt into K folds from the run's seed (stratified by class or event, see
`_resample`). For each fold the screen -> refit pipeline (`_subsets`) runs on the other K - 1 folds
only: the screen ranks the features on the training samples (all K training sets in the same step,
as the columns of one response matrix with the held-out fold set to NaN), the refit is fitted on
them, and the model predicts the held-out fold, whose outcomes it never saw. Per fold: R^2 (linear
and model-free families), AUC and mean deviance (logistic), mean deviance (Poisson), Harrell's
concordance index (Cox).

Why the screen must be inside the folds: features chosen because they correlate with the outcome in
all samples also correlate with it in every held-out fold, by construction; cross-validating only the
refit on a shortlist chosen from all samples therefore reports accuracy even when there is no signal
at all (the selection bias of Ambroise & McLachlan 2002, PNAS 99:6562).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ._metrics import METRICS, held_out_metrics
from ._problem import Problem, shortlist_size
from ._resample import cv_folds, strata_of
from ._subsets import (
    FIT_ERRORS,
    SubsetScreen,
    centre_with,
    fit_subset,
    read_union,
    refit_progress,
    screen_subsets,
    timed,
)


@dataclass
class CVResult:
    """Held-out accuracy of the pipeline, fold by fold.

    Attributes
    ----------
    n_folds : int
    metrics : tuple of str
        The metrics of the family's refit loss (`widescreen.workflow._metrics.METRICS`).
    folds : list of dict
        Per fold: ``fold`` (1-based), ``n_train``, ``n_test``, ``selected`` (size of its model; None
        for a fold skipped) and one entry per metric.
    shortlist : int
        Shortlist size of each training set.
    seconds : dict
        Wall time of the phases run in this session (screen, read, fit).
    skipped : list of str
        Folds that could not be screened or refitted, and why (their metrics are NA and left out
        of the mean).
    """

    n_folds: int
    metrics: tuple[str, ...]
    folds: list[dict]
    shortlist: int
    seconds: dict = field(default_factory=dict)
    skipped: list[str] = field(default_factory=list)

    def summary(self) -> dict[str, dict[str, float]]:
        """Per metric: the mean and standard deviation (ddof 1) over the folds, NaN folds left out."""
        out = {}
        for m in self.metrics:
            v = np.array([f[m] for f in self.folds], dtype=np.float64)
            v = v[np.isfinite(v)]
            out[m] = {
                "mean": float(v.mean()) if v.size else float("nan"),
                "sd": float(v.std(ddof=1)) if v.size > 1 else float("nan"),
            }
        return out

    def record(self) -> dict:
        """The manifest's summary (plain JSON: NaN becomes None)."""

        def plain(x):
            return float(x) if np.isfinite(x) else None

        return {
            "n_folds": self.n_folds,
            "shortlist": self.shortlist,
            "metrics": {
                m: {"mean": plain(s["mean"]), "sd": plain(s["sd"])}
                for m, s in self.summary().items()
            },
            "seconds": self.seconds,
            "skipped": self.skipped,
        }

    def text(self) -> str:
        """One line: each metric as mean +- sd over the folds."""
        names = {"r2": "R^2", "auc": "AUC", "deviance": "deviance", "concordance": "C-index"}
        parts = [
            f"{names.get(m, m)} {s['mean']:.3f} +- {s['sd']:.3f}" for m, s in self.summary().items()
        ]
        return (
            f"{self.n_folds}-fold cross-validation (screen and refit in each fold): "
            + ", ".join(parts)
        )


def _plain(x: float) -> float | None:
    return float(x) if np.isfinite(x) else None


def cross_validate(
    where: SubsetScreen,
    *,
    n_folds: int,
    shortlist: int | str,
    settings,
    seed: int,
    n_candidates: int,
    state: dict | None = None,
    save=None,
) -> CVResult:
    """K-fold cross-validation of the screen -> refit pipeline.

    Parameters
    ----------
    where : SubsetScreen
    n_folds : int
        K.
    shortlist : int or "auto"
        The run's shortlist rule, applied to a training set's sample size.
    settings : FitSettings
    seed : int
    n_candidates : int
        Features the run screened (the EBIC's p).
    state : dict, optional
        The manifest's record of this step (``folds``: per fold its ``shortlist`` and, once fitted and
        scored, its row of `CVResult.folds`), updated in place; what it holds is reused (resume).
    save : callable(), optional
        Called after each update of ``state``.
    """
    problem: Problem = where.problem
    n = problem.n
    loss = problem.family.loss
    metrics = METRICS[loss]
    fold_of = cv_folds(n, n_folds, seed, strata_of(problem))
    train = [np.flatnonzero(fold_of != k) for k in range(n_folds)]
    test = [np.flatnonzero(fold_of == k) for k in range(n_folds)]
    d = shortlist_size(shortlist, min(t.size for t in train), problem.n_features)
    state = {} if state is None else state
    recs = state.get("folds")
    if not isinstance(recs, list) or len(recs) != n_folds or state.get("shortlist") != d:
        recs = [{} for _ in range(n_folds)]
    state.update(folds=recs, shortlist=d)
    seconds: dict[str, float] = {}

    spent = screen_subsets(
        where,
        train,
        recs,
        shortlist=d,
        names=[f"cv_fold{k + 1}" for k in range(n_folds)],
        label="cv training folds",
        save=save,
    )
    if spent is not None:
        seconds["screen"] = spent

    def row(k: int, selected: int | None, scores: dict) -> dict:
        return {
            "fold": k + 1,
            "n_train": int(train[k].size),
            "n_test": int(test[k].size),
            "selected": selected,
            **{m: _plain(scores.get(m, np.nan)) for m in metrics},
        }

    for k, r in enumerate(recs):
        if "error" in r and "row" not in r:
            r["row"] = row(k, None, {})  # a fold that cannot be screened: no score
    tofit = [k for k, r in enumerate(recs) if "row" not in r]
    if tofit:
        lists = [np.asarray(recs[k]["shortlist"], dtype=np.int64) for k in tofit]
        (union, raw), seconds["read"] = timed(read_union, problem, lists, where.sub_block)
        fit_seconds = 0.0
        tick = refit_progress(where, "cv refits", len(tofit))
        for k, top in zip(tofit, lists, strict=True):
            try:
                fit, s = timed(
                    fit_subset, problem, train[k], top, union, raw, settings, n_candidates
                )
            except FIT_ERRORS as exc:
                recs[k]["error"] = f"the refit failed: {exc}"
                recs[k]["row"] = row(k, None, {})
            else:
                fit_seconds += s
                model = fit.model
                cols = np.searchsorted(union, model.index)
                Z = problem.covariates
                eta = model.linear_predictor(
                    centre_with(raw[test[k]][:, cols], fit.mean),
                    None if Z is None else Z[test[k]],
                )
                resp = problem.response.subset(test[k])
                scores = held_out_metrics(loss, resp.y, eta, resp.event)
                recs[k]["row"] = row(k, int(model.index.size), scores)
            if save is not None:
                save()
            tick()
        seconds["fit"] = fit_seconds

    folds = [
        {**r["row"], **{m: np.nan if r["row"][m] is None else r["row"][m] for m in metrics}}
        for r in recs
    ]
    return CVResult(
        n_folds=n_folds,
        metrics=metrics,
        folds=folds,
        shortlist=d,
        seconds={k: round(v, 3) for k, v in seconds.items()},
        skipped=[f"fold {k + 1}: {r['error']}" for k, r in enumerate(recs) if "error" in r],
    )


__all__ = ["CVResult", "cross_validate"]
