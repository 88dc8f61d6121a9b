"""Model-free and nonparametric families: rank, rank utility, distance correlation, splines, HOLP.

They screen a quantitative response without assuming a linear link. Their refit is the least-squares
(Gaussian) one, and the iterative pass conditions by screening the residual of y from the current fit
(``conditioning = "offset"``: the offset is subtracted from y), the residual-screening rule.
"""

from __future__ import annotations

import numpy as np

from ..kernels import (
    check_holp_size,
    dcor_statistics,
    holp_gram,
    holp_statistics,
    prepare_dcor,
    prepare_holp,
    prepare_rank_utility,
    prepare_spearman,
    prepare_spline,
    rank_utility_statistics,
    spearman_statistics,
    spline_statistics,
)
from ._base import Family, PrePass, permuted_copies
from ._response import Response, Where, quantitative


class _ResidualFamily(Family):
    loss = "gaussian"
    conditioning = "offset"
    supports_permutation = True
    takes_covariates = True

    def code(self, where: Where) -> Response:
        return quantitative(where)

    def _y(
        self, response, covariates, offset, n_permutations, seed
    ) -> tuple[np.ndarray, np.ndarray | None]:
        y = response.y if offset is None else response.y - offset
        if not self.takes_covariates and covariates is not None:
            # No adjustment inside the utility: screen the residual of y on the covariates instead.
            Z = np.column_stack([np.ones(y.size), covariates])
            y = y - Z @ np.linalg.lstsq(Z, y, rcond=None)[0]
            covariates = None
        return permuted_copies(y, n_permutations, seed), covariates

    def prepare(
        self,
        response,
        covariates,
        *,
        conditioning=None,
        offset=None,
        n_permutations=0,
        seed=0,
        **kw,
    ):
        if conditioning is not None:
            raise ValueError(f"the {self.name} family conditions through an offset, not columns")
        y, Z = self._y(response, covariates, offset, n_permutations, seed)
        return self._prepare(y, Z, **kw)


class RankFamily(_ResidualFamily):
    """Spearman rank correlation (robust to monotone transformations and outliers)."""

    name = "rank"
    columns = ("score", "rho", "t", "p_value")
    description = "quantitative outcome: Spearman rank correlation"

    def _prepare(self, y, Z):
        return prepare_spearman(y, Z)

    kernel = staticmethod(spearman_statistics)


class RankUtilityFamily(_ResidualFamily):
    """The rank utility of Zhu, Li, Li & Zhu (2011), model-free."""

    name = "rank-utility"
    columns = ("score", "omega")
    takes_covariates = False
    description = "any outcome: the model-free rank utility omega (Zhu et al. 2011)"

    def _prepare(self, y, Z):
        return prepare_rank_utility(y, Z)

    kernel = staticmethod(rank_utility_statistics)


class DistanceCorrelationFamily(_ResidualFamily):
    """Squared distance correlation (Li, Zhong & Zhu 2012): detects any kind of dependence."""

    name = "dcor"
    columns = ("score", "dcor_sqr", "u_dcor_sqr", "dcov_sqr", "p_value")
    takes_covariates = False
    description = "any dependence: squared distance correlation (Li, Zhong & Zhu 2012)"

    def _prepare(self, y, Z):
        return prepare_dcor(y, Z)

    kernel = staticmethod(dcor_statistics)


class SplineFamily(_ResidualFamily):
    """Nonparametric (additive) screening by a B-spline fit per feature (Fan, Feng & Song 2011)."""

    name = "spline"
    columns = ("score", "r2", "f", "p_value")
    description = "nonlinear effects: per-feature B-spline fit (Fan, Feng & Song 2011)"

    def _prepare(self, y, Z):
        return prepare_spline(y, Z)

    kernel = staticmethod(spline_statistics)


class HolpFamily(_ResidualFamily):
    """High-dimensional ordinary least-squares projection (Wang & Leng 2016); needs a Gram pass first."""

    name = "holp"
    columns = ("score", "beta")
    pre_passes = (PrePass("gram", holp_gram, check_holp_size),)
    description = "joint projection: X^T (X X^T + rI)^-1 y (Wang & Leng 2016), two passes"

    def _prepare(self, y, Z, gram=None, ridge=0.0):
        if gram is None:
            raise ValueError("HOLP needs the Gram matrix of its pre-pass (see pre_passes)")
        return prepare_holp(y, gram, Z, ridge=ridge)

    kernel = staticmethod(holp_statistics)
