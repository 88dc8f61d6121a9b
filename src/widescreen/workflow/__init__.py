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
from ._iterate import IterateConfig, IterativeResult, iterate
from ._passes import PassContext
from ._problem import Problem, load_problem, problem_from_arrays, shortlist_size
from ._responses import response_names, screen_responses
from ._run import run
from ._screen import ScreenConfig, ScreenResult, screen, screen_problem
from ._session import RunSession, open_session
from ._split import intersect_ranked, split_halves
from ._thresholds import (
    ThresholdRule,
    bh_cutoff,
    bh_cutoff_blocks,
    bonferroni_cutoff,
    permutation_cutoff,
)

__all__ = [
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
    "ThresholdRule",
    "bh_cutoff",
    "bh_cutoff_blocks",
    "bonferroni_cutoff",
    "intersect_ranked",
    "iterate",
    "join_outcome",
    "load_problem",
    "open_session",
    "permutation_cutoff",
    "problem_from_arrays",
    "read_outcome_table",
    "response_names",
    "run",
    "screen",
    "screen_problem",
    "screen_responses",
    "shortlist_size",
    "split_halves",
]
