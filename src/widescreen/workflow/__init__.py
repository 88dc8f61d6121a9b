"""The workflow: outcome join, screening, thresholds, refits and the iterative passes."""

from ..store._outcome import (
    JoinedOutcome,
    OutcomeError,
    OutcomeTable,
    join_outcome,
    read_outcome_table,
)
from ._problem import Problem, load_problem, problem_from_arrays, shortlist_size
from ._screen import ScreenConfig, ScreenResult, screen
from ._session import RunSession, open_session

__all__ = [
    "JoinedOutcome",
    "OutcomeError",
    "OutcomeTable",
    "Problem",
    "RunSession",
    "ScreenConfig",
    "ScreenResult",
    "join_outcome",
    "load_problem",
    "open_session",
    "problem_from_arrays",
    "read_outcome_table",
    "screen",
    "shortlist_size",
]

from ._iterate import IterateConfig, IterativeResult, iterate
from ._run import run
from ._split import fetch_prepared, intersect_ranked, split_halves
from ._thresholds import (
    ThresholdRule,
    bh_cutoff,
    bh_cutoff_blocks,
    bonferroni_cutoff,
    permutation_cutoff,
)

__all__ += [
    "IterateConfig",
    "IterativeResult",
    "ThresholdRule",
    "bh_cutoff",
    "bh_cutoff_blocks",
    "bonferroni_cutoff",
    "fetch_prepared",
    "intersect_ranked",
    "iterate",
    "permutation_cutoff",
    "run",
    "split_halves",
]
