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


class _GLMFamily(Family):
    columns = GLM_COLUMNS
    conditioning = "offset"

    def prepare(
        self, response, covariates, *, conditioning=None, offset=None, n_permutations=0, seed=0
    ):
        if n_permutations:
            raise ValueError(
                f"the permutation threshold is available for the linear family, not {self.name}"
            )
        if conditioning is not None:
            raise ValueError(f"the {self.name} family conditions through an offset, not columns")
        return self._prepare(response, covariates, offset)


class LogisticFamily(_GLMFamily):
    """Case/control outcome; marginal logistic fits (Fan & Song 2010)."""

    name = "logistic"
    loss = "binomial"
    description = "binary outcome: marginal logistic regression, likelihood-ratio test"

    def response(self, joined, response, event=None):
        if event is not None:
            raise OutcomeError("the logistic family takes no event column")
        return binary_response(joined, response)

    def _prepare(self, response, covariates, offset):
        return prepare_logistic(response.y, covariates, offset)

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

    def _prepare(self, response, covariates, offset):
        return prepare_poisson(response.y, covariates, offset)

    kernel = staticmethod(poisson_statistics)


class CoxFamily(_GLMFamily):
    """Right-censored time to event; marginal Cox partial likelihood (Breslow ties)."""

    name = "cox"
    loss = "cox"
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
