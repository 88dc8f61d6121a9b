"""Statistics kernels: pure functions over one in-memory block, no I/O, no Dask.

Each kernel is a pair: ``prepare_*`` builds a response state once per pass (from the outcome, the
covariates and, in the iterative pass, the conditioning set or offset), and ``*_statistics(block, state)``
maps one `widescreen.store.Block` to a dict of per-feature arrays of shape (width,). Every kernel returns
``score`` (larger is stronger; 0 for a constant feature) and, where a test exists, ``p_value``.
"""

from ._cox import CoxState, cox_statistics, prepare_cox
from ._cox_multi import MultiCoxState, cox_multi_statistics, prepare_cox_multi
from ._dcor import DcorState, dcor_statistics, prepare_dcor
from ._glm import (
    LogisticState,
    PoissonState,
    logistic_statistics,
    poisson_statistics,
    prepare_logistic,
    prepare_poisson,
)
from ._holp import HolpState, check_holp_size, holp_gram, holp_statistics, prepare_holp
from ._linear import LinearState, linear_statistics, prepare_linear
from ._multi import (
    MultiLinearState,
    MultiScoreState,
    linear_multi_statistics,
    prepare_linear_multi,
    prepare_score_multi,
    response_masks,
    score_multi_statistics,
)
from ._rank import (
    RankUtilityState,
    SpearmanState,
    prepare_rank_utility,
    prepare_spearman,
    rank_utility_statistics,
    spearman_statistics,
)
from ._spline import SplineState, prepare_spline, spline_statistics

__all__ = [
    "CoxState",
    "DcorState",
    "HolpState",
    "LinearState",
    "LogisticState",
    "MultiCoxState",
    "MultiLinearState",
    "MultiScoreState",
    "PoissonState",
    "RankUtilityState",
    "SpearmanState",
    "SplineState",
    "check_holp_size",
    "cox_multi_statistics",
    "cox_statistics",
    "dcor_statistics",
    "holp_gram",
    "holp_statistics",
    "linear_multi_statistics",
    "linear_statistics",
    "logistic_statistics",
    "poisson_statistics",
    "prepare_cox",
    "prepare_cox_multi",
    "prepare_dcor",
    "prepare_holp",
    "prepare_linear",
    "prepare_linear_multi",
    "prepare_logistic",
    "prepare_poisson",
    "prepare_rank_utility",
    "prepare_score_multi",
    "prepare_spearman",
    "prepare_spline",
    "rank_utility_statistics",
    "response_masks",
    "score_multi_statistics",
    "spearman_statistics",
    "spline_statistics",
]
