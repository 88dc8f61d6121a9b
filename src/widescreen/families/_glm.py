"""Logistic, Poisson and Cox families: covariate-adjusted likelihood screening, conditioning on the selection."""

from __future__ import annotations

import numpy as np

from ..kernels import (
    cox_multi_statistics,
    cox_statistics,
    logistic_statistics,
    poisson_statistics,
    prepare_cox,
    prepare_cox_multi,
    prepare_logistic,
    prepare_poisson,
    prepare_score_multi,
    score_multi_statistics,
)
from ._base import Family
from ._response import Where, binary, counts, survival

GLM_COLUMNS = ("score", "beta", "std_error", "z", "lr_chi2", "p_value", "converged")


SCORE_COLUMNS = ("score", "beta", "std_error", "z", "score_chi2", "p_value")


def conditioning_columns(
    covariates: np.ndarray | None, conditioning: np.ndarray, tol: float = 1e-10
) -> np.ndarray:
    """Covariates and selected columns as one full-rank adjustment set (n, r), centred.

    The null fit of the conditional pass needs linearly independent columns; a selected column that the
    covariates (or the other selected ones) already span adds nothing to the model, so a pivoted QR keeps
    an orthonormal basis of their span, which gives the same fitted null model.
    """
    from scipy.linalg import qr

    n = conditioning.shape[0]
    parts = [] if covariates is None else [np.asarray(covariates, dtype=np.float64).reshape(n, -1)]
    parts.append(np.asarray(conditioning, dtype=np.float64).reshape(n, -1))
    A = np.hstack(parts)
    A = A - A.mean(axis=0)
    if A.shape[1] == 0:
        return A
    q, r, _ = qr(A, mode="economic", pivoting=True)
    d = np.abs(np.diag(r))
    rank = int(np.sum(d > tol * max(d.max(initial=0.0), 1e-300)))
    return np.ascontiguousarray(q[:, :rank] * np.sqrt(n))


class _GLMFamily(Family):
    """Marginal likelihood screening adjusted for the covariates; the conditional pass given the selection.

    The marginal pass tests ``b_j = 0`` in the full model ``y ~ 1 + covariates + x_j`` (likelihood ratio,
    every nuisance coefficient refitted per feature). The iterative pass conditions on the selected set
    M (Fan, Samworth & Wu 2009) with the standard test given it: the Rao score test of ``b_j = 0`` in
    ``y ~ 1 + covariates + X_M + x_j``, at the unpenalised maximum-likelihood fit of the null model
    ``y ~ 1 + covariates + X_M`` (one matrix product per block). Ranking by it is the one-step form of
    the conditional utility; a feature correlated with the selected ones (the marginally hidden one)
    is judged by its information net of them.
    """

    columns = GLM_COLUMNS
    conditioning = "score"

    def pass_columns(self, state) -> tuple[str, ...]:
        return SCORE_COLUMNS if getattr(state, "test", "lr") == "score" else self.columns

    #: Several responses in one pass: the score test (the exact likelihood fits are per feature and
    #: response, iterative; they stay one response at a time).
    multi_kernel = staticmethod(score_multi_statistics)
    multi_dispersion = "fixed"

    def prepare_multi(self, Y, covariates):
        return prepare_score_multi(self.name, Y, covariates, dispersion=self.multi_dispersion)

    def multi_columns(self) -> tuple[str, ...]:
        return SCORE_COLUMNS

    def prepare(
        self, response, covariates, *, conditioning=None, offset=None, n_permutations=0, seed=0
    ):
        if n_permutations:
            raise ValueError(
                f"the permutation threshold is available for the linear family, not {self.name}"
            )
        if conditioning is None:
            return self._prepare(response, covariates, offset)
        # The penalised model's linear predictor (``offset``) is not used: the null model is refitted
        # without penalty on the covariates and the selected columns.
        return self._prepare(
            response, conditioning_columns(covariates, conditioning), None, "score"
        )


class LogisticFamily(_GLMFamily):
    """Case/control outcome; marginal logistic fits (Fan & Song 2010)."""

    name = "logistic"
    loss = "binomial"
    description = "binary outcome: marginal logistic regression, likelihood-ratio test"

    def code(self, where: Where):
        return binary(where)

    def _prepare(self, response, covariates, offset, test="lr"):
        return prepare_logistic(response.y, covariates, offset, test=test)

    kernel = staticmethod(logistic_statistics)


class PoissonFamily(_GLMFamily):
    """Count outcome; marginal Poisson (log link) fits."""

    name = "poisson"
    loss = "poisson"
    columns = SCORE_COLUMNS
    description = (
        "count outcome: Poisson regression, score test with the variance estimated from the data"
    )

    def code(self, where: Where):
        return counts(where)

    def _prepare(self, response, covariates, offset, test="lr"):
        # Real counts are overdispersed (and a marginal model omits the other causes, which adds
        # variance growing faster than the mean): a plain Poisson test reports noise as signal, and a
        # single quasi-Poisson scale corrects only a variance proportional to the mean. The robust
        # score test (Boos 1992) estimates the score's variance from the data whatever its form.
        return prepare_poisson(response.y, covariates, offset, test="score", dispersion="quadratic")

    kernel = staticmethod(poisson_statistics)
    multi_dispersion = "quadratic"


class CoxFamily(_GLMFamily):
    """Right-censored time to event; marginal Cox partial likelihood (Breslow ties).

    Both passes use the partial-likelihood ratio test of ``b_j = 0`` in the full model: hazard ~
    covariates + x_j, and in the iterative pass covariates + X_M + x_j (the selected columns join the
    refitted covariates; the cost of a fit grows with their number squared).
    """

    name = "cox"
    loss = "cox"
    intercept = False  # the partial likelihood has none: a shift of the linear predictor cancels
    takes_event = True
    conditioning = "columns"

    #: Several responses in one pass: the score test for responses sharing the times and events, each
    #: on its own samples (half-samples, folds); the likelihood-ratio fits stay one response at a time.
    multi_kernel = staticmethod(cox_multi_statistics)

    def pass_columns(self, state) -> tuple[str, ...]:
        return self.columns

    def prepare_multi(self, Y, covariates, event=None):
        if event is None:
            raise ValueError("the cox family's response matrix needs the event indicator")
        return prepare_cox_multi(Y, event, covariates)

    def multi_columns(self) -> tuple[str, ...]:
        return SCORE_COLUMNS

    def prepare(
        self, response, covariates, *, conditioning=None, offset=None, n_permutations=0, seed=0
    ):
        if n_permutations:
            raise ValueError(
                "the permutation threshold is available for the linear family, not cox"
            )
        if conditioning is not None:
            return self._prepare(response, conditioning_columns(covariates, conditioning), None)
        return self._prepare(response, covariates, offset)

    description = "time to event: marginal Cox proportional hazards, likelihood-ratio test"

    def code(self, where: Where):
        return survival(where)

    def _prepare(self, response, covariates, offset):
        return prepare_cox(response.y, response.event, covariates, offset)

    kernel = staticmethod(cox_statistics)
