"""Logistic, Poisson and Cox families: marginal likelihood screening, IRLS refits, offset conditioning."""

from __future__ import annotations

import numpy as np

from ..kernels._cox import cox_statistics, prepare_cox
from ..kernels._glm import (
    logistic_statistics,
    poisson_statistics,
    prepare_logistic,
    prepare_poisson,
)
from ..store._outcome import JoinedOutcome, OutcomeError, is_missing
from ._base import Family, Response, numeric_response

GLM_COLUMNS = ("score", "beta", "std_error", "z", "lr_chi2", "p_value", "converged")


def _bad(joined: JoinedOutcome, column: str, i: int, why: str) -> OutcomeError:
    return OutcomeError(
        f"{joined.table.path}: column {column!r}, line {joined.lines[i]}: "
        f"{str(joined.values[column][i])!r} {why}"
    )


def binary_response(joined: JoinedOutcome, column: str) -> Response:
    """0/1 values, or exactly two text labels (coded in sorted order: first -> 0, second -> 1)."""
    raw = joined.values[column]
    labels = np.unique(raw[~is_missing(raw)])
    if set(labels.tolist()) <= {"0", "1", "0.0", "1.0"}:
        y = raw.astype(float)
        mapping = {}
    else:
        if labels.size != 2:
            shown = ", ".join(map(repr, labels[:5].tolist()))
            raise OutcomeError(
                f"{joined.table.path}: column {column!r} must hold 0/1 or two labels for a binary "
                f"outcome; found {labels.size} distinct values ({shown}{', ...' if labels.size > 5 else ''})"
            )
        y = (raw == labels[1]).astype(float)
        mapping = {str(labels[0]): 0, str(labels[1]): 1}
    if y.min() == y.max():
        raise OutcomeError(
            f"{joined.table.path}: column {column!r} has a single class among the analysed samples"
        )
    return Response(y=y, mapping=mapping)


def count_response(joined: JoinedOutcome, column: str) -> Response:
    y = numeric_response(joined, column)
    bad = (y < 0) | (y != np.round(y))
    if bad.any():
        raise _bad(
            joined, column, int(np.flatnonzero(bad)[0]), "is not a non-negative integer count"
        )
    if y.max() == 0:
        raise OutcomeError(
            f"{joined.table.path}: column {column!r} is zero for every analysed sample"
        )
    return Response(y=y)


def survival_response(joined: JoinedOutcome, time_col: str, event_col: str) -> Response:
    t = numeric_response(joined, time_col)
    bad = t <= 0
    if bad.any():
        raise _bad(joined, time_col, int(np.flatnonzero(bad)[0]), "is not a positive time")
    e = numeric_response(joined, event_col)
    bad = ~np.isin(e, (0.0, 1.0))
    if bad.any():
        raise _bad(
            joined,
            event_col,
            int(np.flatnonzero(bad)[0]),
            "is not an event indicator (1 event, 0 censored)",
        )
    if e.sum() == 0:
        raise OutcomeError(
            f"{joined.table.path}: column {event_col!r} has no events among the analysed samples"
        )
    return Response(y=t, event=e)


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

    def response(self, joined, response, event=None):
        if event is not None:
            raise OutcomeError("the logistic family takes no event column")
        return binary_response(joined, response)

    def _prepare(self, response, covariates, offset, test="lr"):
        return prepare_logistic(response.y, covariates, offset, test=test)

    kernel = staticmethod(logistic_statistics)


class PoissonFamily(_GLMFamily):
    """Count outcome; marginal Poisson (log link) fits."""

    name = "poisson"
    loss = "poisson"
    description = "count outcome: marginal Poisson regression, likelihood-ratio test"

    def response(self, joined, response, event=None):
        if event is not None:
            raise OutcomeError("the poisson family takes no event column")
        return count_response(joined, response)

    def _prepare(self, response, covariates, offset, test="lr"):
        return prepare_poisson(response.y, covariates, offset, test=test)

    kernel = staticmethod(poisson_statistics)


class CoxFamily(_GLMFamily):
    """Right-censored time to event; marginal Cox partial likelihood (Breslow ties).

    The iterative pass conditions through the current model's linear predictor as an offset.
    """

    name = "cox"
    loss = "cox"
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

    def response_columns(self, response, event=None):
        if event is None:
            raise OutcomeError("the cox family needs --event, the column of the event indicator")
        return [response, event]

    def response(self, joined, response, event=None):
        return survival_response(joined, response, event)

    def _prepare(self, response, covariates, offset):
        return prepare_cox(response.y, response.event, covariates, offset)

    kernel = staticmethod(cox_statistics)
