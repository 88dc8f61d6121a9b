"""Out-of-sample accuracy of a fitted model: pure functions of held-out outcomes and predictions.

Each takes the held-out samples' outcome and the model's linear predictor ``eta`` (or its mean) and
returns one number; `held_out_metrics` picks those of a refit loss. Deviances are per sample (the
mean), so folds of different sizes compare.
"""

from __future__ import annotations

import numpy as np
from scipy.special import xlogy


def r2_score(y: np.ndarray, pred: np.ndarray) -> float:
    """1 - sum (y - pred)^2 / sum (y - mean(y))^2 over the held-out samples (0 for the held-out
    mean as prediction, negative for a model worse than it); NaN when y is constant."""
    y = np.asarray(y, dtype=np.float64)
    pred = np.asarray(pred, dtype=np.float64)
    tot = float(np.sum((y - y.mean()) ** 2))
    if tot == 0.0:
        return float("nan")
    return 1.0 - float(np.sum((y - pred) ** 2)) / tot


def roc_auc(y: np.ndarray, score: np.ndarray) -> float:
    """Area under the ROC curve: the Mann-Whitney probability that a case (y = 1) scores above a
    control, ties counting one half; NaN without both classes."""
    y = np.asarray(y).astype(bool)
    n1 = int(y.sum())
    n0 = y.size - n1
    if n1 == 0 or n0 == 0:
        return float("nan")
    from scipy.stats import rankdata  # here: importing the workflow loads no scipy.stats

    ranks = rankdata(np.asarray(score, dtype=np.float64))  # average ranks: ties count one half
    return (float(ranks[y].sum()) - n1 * (n1 + 1) / 2.0) / (n1 * n0)


def binomial_deviance(y: np.ndarray, eta: np.ndarray) -> float:
    """Mean binomial deviance -2 / n sum [y log p + (1 - y) log(1 - p)], p = expit(eta)."""
    y = np.asarray(y, dtype=np.float64)
    eta = np.asarray(eta, dtype=np.float64)
    # log p = -log(1 + e^-eta), log(1 - p) = -log(1 + e^eta): exact for large |eta|
    loglik = -y * np.logaddexp(0.0, -eta) - (1.0 - y) * np.logaddexp(0.0, eta)
    return float(-2.0 * loglik.mean())


def poisson_deviance(y: np.ndarray, eta: np.ndarray) -> float:
    """Mean Poisson deviance 2 / n sum [y log(y / mu) - (y - mu)], mu = exp(eta) (y log y = 0 at 0)."""
    y = np.asarray(y, dtype=np.float64)
    eta = np.asarray(eta, dtype=np.float64)
    mu = np.exp(eta)
    return float(2.0 * np.mean(xlogy(y, y) - y * eta - (y - mu)))


def concordance_index(time: np.ndarray, event: np.ndarray, risk: np.ndarray) -> float:
    """Harrell's C: among usable pairs (the shorter time is an event), the share where the shorter
    time has the higher risk; risk ties count one half (Harrell et al. 1982, JAMA 247:2543).

    Vectorised over pairs through sorting: for each event time t_i, the samples still at risk
    (time > t_i) are counted by their risk relative to risk_i with two searchsorted calls per
    distinct event, so the cost is O(n log n) per event, without an n x n matrix.
    """
    time = np.asarray(time, dtype=np.float64)
    event = np.asarray(event, dtype=bool)
    risk = np.asarray(risk, dtype=np.float64)
    order = np.argsort(time, kind="stable")
    time, event, risk = time[order], event[order], risk[order]
    # Suffix sorted risks: samples with a strictly longer time than t_i are those after the last
    # index with time == t_i.
    after = np.searchsorted(time, time, side="right")
    concordant = 0.0
    usable = 0.0
    for start in np.unique(after[event]):
        later = np.sort(risk[start:])
        here = event & (after == start)
        r = risk[here]
        lo = np.searchsorted(later, r, side="left")
        hi = np.searchsorted(later, r, side="right")
        concordant += float(np.sum(lo) + 0.5 * np.sum(hi - lo))
        usable += float(r.size * later.size)
    if usable == 0:
        raise ValueError("no usable pairs for the concordance index (no event before a later time)")
    return concordant / usable


#: The metrics reported for each refit loss, in their order.
METRICS: dict[str, tuple[str, ...]] = {
    "gaussian": ("r2",),
    "binomial": ("auc", "deviance"),
    "poisson": ("deviance",),
    "cox": ("concordance",),
}


def held_out_metrics(
    loss: str, y: np.ndarray, eta: np.ndarray, event: np.ndarray | None = None
) -> dict[str, float]:
    """The metrics of `METRICS` [loss] for held-out outcomes ``y`` and linear predictor ``eta``.

    Gaussian: R^2 of eta as the prediction. Binomial: AUC of eta (any increasing score gives the same
    AUC) and the mean deviance of expit(eta). Poisson: mean deviance of exp(eta). Cox: Harrell's C of
    eta as the risk (``y`` the times, ``event`` the indicators); NaN when no pair is usable.
    """
    if loss == "gaussian":
        return {"r2": r2_score(y, eta)}
    if loss == "binomial":
        return {"auc": roc_auc(y, eta), "deviance": binomial_deviance(y, eta)}
    if loss == "poisson":
        return {"deviance": poisson_deviance(y, eta)}
    if loss == "cox":
        try:
            c = concordance_index(y, np.asarray(event), eta)
        except ValueError:
            c = float("nan")
        return {"concordance": c}
    raise ValueError(f"no held-out metrics for the loss {loss!r}")


__all__ = [
    "METRICS",
    "binomial_deviance",
    "concordance_index",
    "held_out_metrics",
    "poisson_deviance",
    "r2_score",
    "roc_auc",
]
