"""Logistic, Poisson and Cox families: marginal likelihood screening, IRLS refits, offset conditioning."""

from __future__ import annotations

import numpy as np

from ..kernels import (
    cox_statistics,
    logistic_statistics,
    poisson_statistics,
    prepare_cox,
    prepare_logistic,
    prepare_poisson,
)
from ._base import Family
from ._response import Where, binary, counts, survival

GLM_COLUMNS = ("score", "beta", "std_error", "z", "lr_chi2", "p_value", "converged")


SCORE_COLUMNS = ("score", "beta", "std_error", "z", "score_chi2", "p_value")


def _weighted_basis(
    C: np.ndarray, w: np.ndarray, tol: float = 1e-10
) -> tuple[np.ndarray, np.ndarray]:
    """Q, an orthonormal basis of W^1/2 C, and G = W^1/2 Q.

    |G' x|^2 = x' W C (C' W C)^- C' W x is the part of x's information that C explains.
    """
    from scipy.linalg import qr

    sw = np.sqrt(np.maximum(w, 1e-300))
    q, r, _ = qr(C * sw[:, None], mode="economic", pivoting=True)
    d = np.abs(np.diag(r))
    rank = int(np.sum(d > tol * max(d.max(initial=0.0), 1e-300)))
    q = q[:, :rank]
    return q, np.ascontiguousarray(q * sw[:, None])


class _GLMFamily(Family):
    """Marginal likelihood screening; the conditional pass is a score test given the selected set.

    The iterative pass conditions on the current model (Fan, Samworth & Wu 2009) through its linear
    predictor as an offset *and* by adjusting each candidate for the selected columns: the efficient
    Rao score statistic of x_j at the current fit, (x_j - P x_j)' (y - mu) over the information of x_j
    net of what the covariates and the selected features explain (P: the projection in the fit's
    weight metric). It is the one-step form of the conditional utility; without the adjustment a
    feature correlated with the selected ones (the marginally hidden one) is ranked by its raw
    variance and missed.
    """

    columns = GLM_COLUMNS
    conditioning = "score"

    def pass_columns(self, state) -> tuple[str, ...]:
        return SCORE_COLUMNS if getattr(state, "test", "lr") == "score" else self.columns

    def prepare(
        self, response, covariates, *, conditioning=None, offset=None, n_permutations=0, seed=0
    ):
        if n_permutations:
            raise ValueError(
                f"the permutation threshold is available for the linear family, not {self.name}"
            )
        if conditioning is None:
            return self._prepare(response, covariates, offset)
        from dataclasses import replace

        state = self._prepare(response, covariates, offset, test="score")
        n = response.y.size
        parts = [np.ones((n, 1))]
        if covariates is not None:
            parts.append(np.asarray(covariates, dtype=np.float64).reshape(n, -1))
        parts.append(np.asarray(conditioning, dtype=np.float64).reshape(n, -1))
        Q, G = _weighted_basis(np.hstack(parts), state.w0)
        # The current fit is penalised, so r = y - mu is not orthogonal to the selected columns: use
        # r_adj = r - W C (C'WC)^- C' r (then x' r_adj = (x - P x)' r), by shifting the state's mean.
        sw = np.sqrt(np.maximum(state.w0, 1e-300))
        r = state.y - state.mu0
        shift = sw * (Q @ (Q.T @ (r / sw)))
        return replace(state, score_basis=G, mu0=state.mu0 + shift)


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
    description = "count outcome: marginal Poisson regression, likelihood-ratio test"

    def code(self, where: Where):
        return counts(where)

    def _prepare(self, response, covariates, offset, test="lr"):
        return prepare_poisson(response.y, covariates, offset, test=test)

    kernel = staticmethod(poisson_statistics)


class CoxFamily(_GLMFamily):
    """Right-censored time to event; marginal Cox partial likelihood (Breslow ties).

    The iterative pass conditions through the current model's linear predictor as an offset.
    """

    name = "cox"
    loss = "cox"
    intercept = False  # the partial likelihood has none: a shift of the linear predictor cancels
    takes_event = True
    conditioning = "offset"

    def pass_columns(self, state) -> tuple[str, ...]:
        return self.columns

    def prepare(
        self, response, covariates, *, conditioning=None, offset=None, n_permutations=0, seed=0
    ):
        if n_permutations:
            raise ValueError(
                "the permutation threshold is available for the linear family, not cox"
            )
        if conditioning is not None:
            raise ValueError("the cox family conditions through an offset, not columns")
        return self._prepare(response, covariates, offset)

    description = "time to event: marginal Cox proportional hazards, likelihood-ratio test"

    def code(self, where: Where):
        return survival(where)

    def _prepare(self, response, covariates, offset):
        return prepare_cox(response.y, response.event, covariates, offset)

    kernel = staticmethod(cox_statistics)
