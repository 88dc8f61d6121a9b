"""The workflow: problems, screening, thresholds, refits and the iterative passes.

Two routes in, one core. The array-level core runs on a `Problem`:

>>> problem = Problem.from_arrays(X, y, family="logistic", covariates=Z, sample_ids=ids)  # doctest: +SKIP
>>> screen_problem(problem, shortlist=50).statistics  # one pass, every feature's statistics  # doctest: +SKIP
>>> iterate(problem, IterateConfig(family="logistic", shortlist=20))  # ISIS and the refits  # doctest: +SKIP

(the scikit-learn estimators: validate, then one of these calls). The file route, `screen` and `run`,
reads a store and an outcome table into the same `Problem` (`load_problem`) and records everything in a
run folder. Every pass of either route is built by one builder, `PassContext`.
"""

from ..store import (
    JoinedOutcome,
    OutcomeError,
    OutcomeTable,
    join_outcome,
    read_outcome_table,
)
from ._crossval import CVResult, cross_validate
from ._iterate import IterateConfig, IterativeResult, iterate
from ._metrics import (
    binomial_deviance,
    concordance_index,
    held_out_metrics,
    poisson_deviance,
    r2_score,
    roc_auc,
)
from ._passes import PassContext
from ._problem import Problem, load_problem, problem_from_arrays, shortlist_size
from ._resample import complementary_pairs, cv_folds, strata_of
from ._responses import response_names, screen_responses
from ._run import run
from ._screen import ScreenConfig, ScreenResult, screen, screen_problem
from ._session import RunSession, open_session
from ._split import intersect_ranked, split_halves
from ._stability import StabilityResult, mb_bound, ss_unimodal_bound, stability_selection
from ._thresholds import (
    ThresholdRule,
    bh_cutoff,
    bh_cutoff_blocks,
    bonferroni_cutoff,
    permutation_cutoff,
)
from ._traits import Traits, TraitsResult, load_traits, run_traits, screen_traits

__all__ = [
    "CVResult",
    "IterateConfig",
    "IterativeResult",
    "JoinedOutcome",
    "OutcomeError",
    "OutcomeTable",
    "PassContext",
    "Problem",
    "RunSession",
    "ScreenConfig",
    "ScreenResult",
    "StabilityResult",
    "ThresholdRule",
    "Traits",
    "TraitsResult",
    "bh_cutoff",
    "bh_cutoff_blocks",
    "binomial_deviance",
    "bonferroni_cutoff",
    "complementary_pairs",
    "concordance_index",
    "cross_validate",
    "cv_folds",
    "held_out_metrics",
    "intersect_ranked",
    "iterate",
    "join_outcome",
    "load_problem",
    "load_traits",
    "mb_bound",
    "open_session",
    "permutation_cutoff",
    "poisson_deviance",
    "problem_from_arrays",
    "r2_score",
    "read_outcome_table",
    "response_names",
    "roc_auc",
    "run",
    "run_traits",
    "screen",
    "screen_problem",
    "screen_responses",
    "screen_traits",
    "shortlist_size",
    "split_halves",
    "ss_unimodal_bound",
    "stability_selection",
    "strata_of",
]
