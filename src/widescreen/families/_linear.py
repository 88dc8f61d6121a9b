"""The linear family: Pearson / partial correlation screening, least-squares refits."""

from __future__ import annotations

import numpy as np

from ..kernels import (
    linear_multi_statistics,
    linear_statistics,
    prepare_linear,
    prepare_linear_multi,
)
from ._base import Family
from ._response import Response, Where, quantitative


class LinearFamily(Family):
    """Quantitative response; utility |correlation| (partial, given covariates and the selected set)."""

    name = "linear"
    columns = ("score", "correlation", "t", "p_value")
    loss = "gaussian"
    conditioning = "columns"
    supports_permutation = True
    description = "quantitative trait: (partial) Pearson correlation, t test"

    def code(self, where: Where) -> Response:
        return quantitative(where)

    def prepare(
        self, response, covariates, *, conditioning=None, offset=None, n_permutations=0, seed=0
    ):
        y = response.y
        if offset is not None:
            y = y - offset
        if n_permutations:
            # Permute the residual of y given the covariates and the selected set, so the null keeps
            # what is already explained (the later-iteration rule of the permutation threshold).
            base = prepare_linear(y, covariates, conditioning)
            resid = base.y[:, 0]
            rng = np.random.default_rng(seed)
            perms = np.stack([rng.permutation(resid) for _ in range(n_permutations)], axis=1)
            return prepare_linear(np.column_stack([y, perms]), covariates, conditioning)
        return prepare_linear(y, covariates, conditioning)

    kernel = staticmethod(linear_statistics)

    def prepare_multi(self, Y, covariates):
        return prepare_linear_multi(Y, covariates)

    multi_kernel = staticmethod(linear_multi_statistics)
