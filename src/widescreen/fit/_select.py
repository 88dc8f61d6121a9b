"""Choosing one model from a path: BIC, extended BIC or K-fold cross-validation.

By default (``tuning="refit"``) a criterion scores each support the path visits by its unpenalised
maximum likelihood refit (`_mle.refit`): the EBIC of Chen & Chen (2008, Biometrika 95:759) is defined for
a model's maximum likelihood, ``-2 log L(beta_hat_S) + |S| log n + 2 gamma log C(p, |S|)``, and the
penalised estimate's likelihood is lower (its large coefficients are shrunk below ``a lambda`` at larger
lambdas), which tilts the choice towards larger models or towards the empty one. The chosen model is
therefore the criterion's best over the visited supports; the path supplies the candidate supports
(as in the relaxed lasso of Meinshausen 2007, CSDA 52:374, with no shrinkage left). For ``"cv"`` each
visited support's refit is cross-validated (refitted on the training folds, scored on the held-out one).
``tuning="path"`` gives the former behaviour: the criterion at the penalised estimates of each lambda.

For SCAD and MCP tuned by BIC / EBIC the candidates also include the supports of a stepwise search on
the criterion (`_forward`): a warm-started path follows one branch of a non-convex problem and can miss
the sparse model when features stand in for one another.
"""

from __future__ import annotations

import numpy as np

from ._criteria import bic, default_ebic_gamma, ebic, log_binomial
from ._forward import stepwise_supports
from ._mle import Refit, refit, refit_columns
from ._path import blas_limit, path_on_problem
from ._results import FitResult, PathResult

_CRITERIA = ("bic", "ebic", "cv")
_TUNINGS = ("refit", "path")
#: Steps without a better criterion value after which the stepwise search stops.
_PATIENCE = 5


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


def refit_support(path: PathResult, support: np.ndarray, *, with_se: bool = False) -> Refit:
    """Unpenalised refit of ``path``'s data on the features ``support`` (original scale).

    Tuning needs only its likelihood: standard errors (NaN) only with ``with_se``.
    """
    pr = path.problem
    Z = pr.Z if pr.Z.shape[1] else None
    return refit(pr.X[:, support], pr.y, pr.loss, Z, pr.offset, with_se=with_se)


def _supports(path: PathResult) -> tuple[list[np.ndarray], np.ndarray]:
    """The distinct supports of the path and, per lambda, the position of its support in that list."""
    seen: dict[bytes, int] = {}
    supports: list[np.ndarray] = []
    which = np.empty(path.lambdas.shape[0], dtype=np.int64)
    for i, b in enumerate(path.coefs_standardized):
        s = np.flatnonzero(b)
        key = s.tobytes()
        if key not in seen:
            seen[key] = len(supports)
            supports.append(s)
        which[i] = seen[key]
    return supports, which


def _floor(path: PathResult, union: np.ndarray) -> float:
    """A lower bound of ``-2 log L`` at the refit of any subset of ``union``.

    The refit of the union itself when it has one (a subset's maximum likelihood cannot exceed its
    superset's); otherwise the loss's own bound (binomial and Cox: log-likelihood <= 0; Poisson: the
    saturated model's log-likelihood), or -inf for the Gaussian loss.
    """
    pr = path.problem
    q = pr.C.shape[1]
    if union.size + q < pr.n - 1:
        fit = refit_support(path, union)
        if fit.exists:
            return -2.0 * fit.log_likelihood
    name = pr.loss.name
    if name in ("binomial", "cox"):
        return 0.0
    if name == "poisson":
        y = pr.y
        return -2.0 * float(np.sum(np.where(y > 0, y * np.log(np.where(y > 0, y, 1.0)), 0.0) - y))
    return -np.inf


def _refit_criterion(path: PathResult, supports, penalty_of_size) -> np.ndarray:
    """Criterion at the refit of each distinct support; NaN where it provably cannot win.

    Supports are scored from the smallest up; a support whose bound (`_floor` plus its size penalty)
    already exceeds the best value found is skipped, so only supports that could be chosen are refitted.
    """
    values = np.full(len(supports), np.nan)
    union = np.unique(np.concatenate(supports)) if supports else np.empty(0, dtype=np.int64)
    floor = None
    best = np.inf
    pr = path.problem
    for i in sorted(range(len(supports)), key=lambda i: supports[i].size):
        s = supports[i]
        if s.size + pr.C.shape[1] >= pr.n - 1:
            values[i] = np.inf  # no unpenalised refit: as many coefficients as samples
            continue
        if np.isfinite(best) and s.size > 0:
            if floor is None:
                floor = _floor(path, union)
            if floor + penalty_of_size(s.size) > best:
                continue
        fit = refit_support(path, s)
        values[i] = -2.0 * fit.log_likelihood + penalty_of_size(s.size) if fit.exists else np.inf
        best = min(best, values[i])
    return values


def _stepwise_choice(path: PathResult, supports, per_support, penalty_of_size):
    """The stepwise search's best support if it beats every support the path visits, else None.

    Returns ``(support, value)``.
    """
    pr = path.problem
    finite = per_support[np.isfinite(per_support)]
    target = float(finite.min()) if finite.size else np.inf
    seen = {s.tobytes() for s in supports}
    union = np.unique(np.concatenate(supports)) if supports else np.empty(0, dtype=np.int64)
    floor: list[float] = []
    max_size = min(pr.d, pr.n - pr.C.shape[1] - 2)

    def hopeless(k: int, best: float) -> bool:
        # No support of size k + 1 can beat the best found (see `_floor`).
        if k + 1 > max_size:
            return True
        if not floor:
            floor.append(_floor(path, union) if union.size else -np.inf)
        return floor[0] + penalty_of_size(k + 1) > min(best, target)

    found = stepwise_supports(pr, penalty_of_size, max_size, hopeless, _PATIENCE)
    fresh = [(v, s) for key, (s, v) in found.items() if key not in seen and v < target]
    if not fresh:
        return None
    value, support = min(fresh, key=lambda t: (t[0], t[1].size))
    return support, value


def cross_validate_supports(
    path: PathResult, supports: list[np.ndarray], n_folds: int = 5, seed: int = 0
) -> tuple[np.ndarray, np.ndarray]:
    """K-fold cross-validated deviance of the unpenalised refit of each support.

    Folds as in `cross_validate`; each support is refitted on the training folds and scored by the
    loss's held-out deviance. Returns the mean (summed over folds, divided by n) and the standard error
    of the per-fold means, each of shape (len(supports),); inf where a fold's refit does not exist.
    """
    pr = path.problem
    n = pr.n
    if not (isinstance(n_folds, int | np.integer) and 2 <= n_folds <= n):
        raise ValueError(
            f"The number of folds 'cv' must be an int in [2, n = {n}]; got {n_folds!r}."
        )
    folds = np.array_split(np.random.default_rng(seed).permutation(n), n_folds)
    sizes = np.array([f.size for f in folds], dtype=np.float64)
    lead = [np.ones((n, 1))] if pr.loss.has_intercept else []
    per = np.full((n_folds, len(supports)), np.inf)
    for j, s in enumerate(supports):
        D = np.hstack([*lead, pr.Z, pr.X[:, s]])
        for k, held in enumerate(folds):
            test = np.zeros(n, dtype=bool)
            test[held] = True
            train = ~test
            if D.shape[1] >= train.sum() - 1:
                continue
            coef, _, _, exists, _ = refit_columns(D[train], pr.y[train], pr.loss, pr.offset[train])
            if exists:
                eta = pr.offset + D @ coef
                per[k, j] = pr.loss.heldout_deviance(pr.y, eta, test) / sizes[k]
    mean = (per * sizes[:, None]).sum(axis=0) / n
    with np.errstate(invalid="ignore"):
        se = per.std(axis=0, ddof=1) / np.sqrt(n_folds)
    mean[~np.all(np.isfinite(per), axis=0)] = np.inf
    return mean, np.where(np.isfinite(mean), se, np.inf)


def select_model(
    path: PathResult,
    criterion: str = "ebic",
    *,
    n_candidates: int | None = None,
    gamma: float | None = None,
    cv: int = 5,
    seed: int = 0,
    tuning: str = "refit",
    forward: bool = True,
) -> FitResult:
    """Pick the model of ``path`` that minimises an information criterion or the CV deviance.

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
        EBIC gamma in [0, 1]. Default 1 with ``tuning="refit"``, the conservative end of Chen & Chen's
        range: an unpenalised refit's likelihood carries the optimism of the selection (its features
        were picked for fitting these data), which gamma = 1 pays for; `default_ebic_gamma(n, p)` (the
        consistency bound) with ``tuning="path"``, whose shrunken estimates pay for it themselves.
    cv : int
        Number of folds for ``"cv"``.
    seed : int
        Seed of the fold assignment.
    tuning : {"refit", "path"}
        ``"refit"`` (default): ``L`` is the likelihood of the unpenalised refit of each support the
        path visits (CV: the refit cross-validated), so the choice is the criterion's best over those
        supports; among the lambdas sharing the chosen support, the smallest is reported (its
        penalised coefficients are the least shrunk). ``"path"``: ``L`` at the penalised estimates.
    forward : bool
        With ``tuning="refit"``, BIC / EBIC and SCAD or MCP: also consider the supports of a stepwise
        search on the criterion (`_forward`). When one of them is chosen, ``index`` is None,
        ``lambda_`` is NaN and ``coef`` is its refit (no penalised estimate belongs to it).

    Returns
    -------
    FitResult
    """
    # Many small refits and products: BLAS threads lose more to hand-offs than they gain (the path's
    # own rule, `SolverOptions.blas_threads`; on a busy machine the tuning ran 8x slower without it).
    with blas_limit(path.options):
        if criterion not in _CRITERIA:
            raise ValueError(f"The 'criterion' must be one of {_CRITERIA}; got {criterion!r}.")
        if tuning not in _TUNINGS:
            raise ValueError(f"The 'tuning' must be one of {_TUNINGS}; got {tuning!r}.")
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
            if gamma is not None:
                used_gamma = float(gamma)
            else:
                used_gamma = 1.0 if tuning == "refit" else default_ebic_gamma(n, p)
        supports, which = _supports(path)
        extra = None
        if tuning == "path":
            if criterion == "ebic":
                values = ebic(path.log_likelihood, path.df, n, p, used_gamma)
            elif criterion == "bic":
                values = bic(path.log_likelihood, path.df, n)
            else:
                values, se = cross_validate(path, cv, seed)
        else:
            if criterion == "cv":
                per_support, se_support = cross_validate_supports(path, supports, cv, seed)
                se = se_support[which]
            else:
                g = used_gamma if criterion == "ebic" else 0.0
                pp = p if criterion == "ebic" else d

                def penalty_of_size(k: int) -> float:
                    return k * np.log(n) + 2.0 * g * float(log_binomial(pp, k))

                per_support = _refit_criterion(path, supports, penalty_of_size)
                if forward and path.penalty.concave:
                    extra = _stepwise_choice(path, supports, per_support, penalty_of_size)
            values = per_support[which]
        finite = np.isfinite(values)
        if tuning == "refit" and not np.any(finite) and criterion != "cv":
            # No visited support has a maximum likelihood estimate (for example a constant or separated
            # response): score the penalised estimates instead, which always exist.
            extra = None
            values = (
                ebic(path.log_likelihood, path.df, n, p, used_gamma)
                if criterion == "ebic"
                else bic(path.log_likelihood, path.df, n)
            )
            finite = np.isfinite(values)
        if not np.any(finite):
            raise ValueError(f"The {criterion} criterion is not finite at any lambda of the path.")
        # First minimum: ties go to the larger lambda (the sparser model).
        best = int(np.argmin(np.where(finite, values, np.inf)))
        if tuning == "refit":
            # The same support at the next lambdas: report the last of the run (least shrunk).
            while best + 1 < which.shape[0] and which[best + 1] == which[best]:
                best += 1
        index: int | None = best
        lambda_ = float(path.lambdas[best])
        coef = path.coefs[best]
        intercept = float(path.intercepts[best])
        unpen = path.unpenalized_coefs[best]
        value = float(values[best])
        support = np.flatnonzero(coef)
        if extra is not None:
            support, value = extra
        fit = refit_support(path, support, with_se=True)
        if extra is not None:
            # A support off the path: no penalised estimate belongs to it, so its refit stands in.
            index, lambda_ = None, float("nan")
            coef = np.zeros(d)
            coef[support] = fit.coef
            intercept, unpen = fit.intercept, fit.unpenalized_coef
        refit_coef = np.zeros(d)
        refit_se = np.full(d, np.nan)
        refit_coef[support] = fit.coef
        refit_se[support] = fit.se
        return FitResult(
            coef=coef,
            intercept=intercept,
            unpenalized_coef=unpen,
            support=support,
            lambda_=lambda_,
            index=index,
            criterion=criterion,
            criterion_value=value,
            criterion_values=values,
            lambdas=path.lambdas,
            coefs=path.coefs,
            ebic_gamma=used_gamma,
            n_candidates=p,
            cv_std_error=se,
            path=path,
            tuning=tuning,
            refit=fit,
            refit_coef=refit_coef,
            refit_se=refit_se,
        )
