"""Choosing one model from a path: BIC, extended BIC or K-fold cross-validation."""

from __future__ import annotations

import numpy as np

from ._criteria import bic, default_ebic_gamma, ebic
from ._path import path_on_problem
from ._results import FitResult, PathResult

_CRITERIA = ("bic", "ebic", "cv")


def cross_validate(
    path: PathResult, n_folds: int = 5, seed: int = 0
) -> tuple[np.ndarray, np.ndarray]:
    """K-fold cross-validated deviance at each lambda of ``path``.

    The samples are shuffled with ``numpy.random.default_rng(seed)`` and split into ``n_folds`` folds
    of (nearly) equal size. For each fold the whole fit (standardisation, adaptive weights unless an
    initial estimate was given as an array, path at the same lambdas) is redone on the other folds and scored on the held-out one by the loss's held-out
    deviance (for Cox, the cross-validated partial likelihood of Verweij & van Houwelingen 1993).

    Returns
    -------
    mean : ndarray of shape (L,)
        Held-out deviance summed over folds, divided by n (so the scale of a per-sample deviance).
        ``inf`` at lambdas some fold's path did not reach (a saturated GLM path stops early).
    std_error : ndarray of shape (L,)
        Standard error of the per-fold mean deviances.
    """
    problem = path.problem
    n = problem.n
    if not (isinstance(n_folds, int | np.integer) and 2 <= n_folds <= n):
        raise ValueError(
            f"The number of folds 'cv' must be an int in [2, n = {n}]; got {n_folds!r}."
        )
    folds = np.array_split(np.random.default_rng(seed).permutation(n), n_folds)
    L = path.lambdas.shape[0]
    per_fold = np.full((n_folds, L), np.inf)
    sizes = np.array([f.size for f in folds], dtype=np.float64)
    for k, held in enumerate(folds):
        test = np.zeros(n, dtype=bool)
        test[held] = True
        sub = problem.subset(~test)
        fold_path = path_on_problem(sub, path.penalty, lambdas=path.lambdas, options=path.options)
        # Linear predictor of every sample under the fold's coefficients (Cox's score needs all of them).
        eta = (
            problem.offset[:, None]
            + fold_path.intercepts[None, :]
            + problem.Z @ fold_path.unpenalized_coefs.T
            + problem.X @ fold_path.coefs.T
        )
        for i in range(fold_path.lambdas.shape[0]):
            per_fold[k, i] = problem.loss.heldout_deviance(problem.y, eta[:, i], test) / sizes[k]
    mean = (per_fold * sizes[:, None]).sum(axis=0) / n
    with np.errstate(invalid="ignore"):
        se = per_fold.std(axis=0, ddof=1) / np.sqrt(n_folds)
    mean[~np.all(np.isfinite(per_fold), axis=0)] = np.inf
    return mean, np.where(np.isfinite(mean), se, np.inf)


def select_model(
    path: PathResult,
    criterion: str = "ebic",
    *,
    n_candidates: int | None = None,
    gamma: float | None = None,
    cv: int = 5,
    seed: int = 0,
) -> FitResult:
    """Pick the lambda of ``path`` that minimises an information criterion or the CV deviance.

    Parameters
    ----------
    path : PathResult
    criterion : {"ebic", "bic", "cv"}
        ``"ebic"``: ``-2 log L + k log n + 2 gamma log C(p, k)`` (Chen & Chen 2008); ``"bic"``:
        ``-2 log L + k log n``; ``"cv"``: mean held-out deviance over ``cv`` folds. ``k`` counts the
        selected features.
    n_candidates : int, required for "ebic"
        ``p``: the number of candidate features the model was chosen from. After screening this is the
        number of features screened, not the shortlist length (pass ``X.shape[1]`` when there was no
        screening).
    gamma : float, optional
        EBIC gamma in [0, 1]; default `default_ebic_gamma(n, p)`.
    cv : int
        Number of folds for ``"cv"``.
    seed : int
        Seed of the fold assignment.

    Returns
    -------
    FitResult
    """
    if criterion not in _CRITERIA:
        raise ValueError(f"The 'criterion' must be one of {_CRITERIA}; got {criterion!r}.")
    n, d = path.n_samples, path.n_features
    se = None
    used_gamma = None
    p = None
    if criterion == "ebic":
        if n_candidates is None:
            raise ValueError(
                "The EBIC needs 'n_candidates', the number of features the model was chosen from "
                "(the number screened; X.shape[1] when there was no screening)."
            )
        p = int(n_candidates)
        if p < d:
            raise ValueError(
                f"'n_candidates' ({p}) cannot be below the number of fitted features ({d})."
            )
        used_gamma = default_ebic_gamma(n, p) if gamma is None else float(gamma)
        values = ebic(path.log_likelihood, path.df, n, p, used_gamma)
    elif criterion == "bic":
        values = bic(path.log_likelihood, path.df, n)
    else:
        values, se = cross_validate(path, cv, seed)
    if not np.any(np.isfinite(values)):
        raise ValueError(f"The {criterion} criterion is not finite at any lambda of the path.")
    # First minimum: ties go to the larger lambda (the sparser model).
    best = int(np.argmin(np.where(np.isfinite(values), values, np.inf)))
    coef = path.coefs[best]
    return FitResult(
        coef=coef,
        intercept=float(path.intercepts[best]),
        unpenalized_coef=path.unpenalized_coefs[best],
        support=np.flatnonzero(coef),
        lambda_=float(path.lambdas[best]),
        index=best,
        criterion=criterion,
        criterion_values=values,
        lambdas=path.lambdas,
        coefs=path.coefs,
        ebic_gamma=used_gamma,
        n_candidates=p,
        cv_std_error=se,
        path=path,
    )
