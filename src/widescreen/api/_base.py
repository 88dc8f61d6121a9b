"""What both estimators do before the workflow runs: validate X, y and covariates and align them."""

from __future__ import annotations

import numpy as np

from ..families import get_family
from ..workflow import Problem
from ._core import make_problem
from ._inputs import Design, align, read_covariates, read_design
from ._target import no_target, read_target, target_length

MIN_SAMPLES = 4


def fit_inputs(
    estimator, X, y, covariates
) -> tuple[Design, Problem, np.ndarray | None, dict[str, list[str]]]:
    """X, y and the covariates validated and aligned on X's samples, as a workflow problem.

    Covariates given to ``fit`` replace the estimator's ``covariates`` parameter. Returns the design,
    the problem, the class labels (binary families; None otherwise) and the levels of the
    categorical covariates (dummy-coded, the first level the reference).
    """
    family = get_family(estimator.family)
    design = read_design(estimator, X, reset=True)
    if y is None:
        raise no_target(estimator)
    y = align(y, design, "y")
    if target_length(y) != design.n:
        raise ValueError(
            "Found input variables with inconsistent numbers of samples: "
            f"[{design.n}, {target_length(y)}] (X, y)"
        )
    if design.n < MIN_SAMPLES:
        raise ValueError(
            f"need at least {MIN_SAMPLES} samples to screen; got n_samples = {design.n}"
        )
    target = read_target(family, y)
    Z, names, levels = read_covariates(
        estimator.covariates if covariates is None else covariates, design
    )
    problem = make_problem(design, family, target, Z, names)
    return design, problem, target.classes, levels


def predict_covariates(estimator, design: Design, covariates, q: int) -> np.ndarray | None:
    """The covariates of X's samples for a prediction, when the model adjusts for ``q`` of them."""
    if q == 0:
        return None
    given = estimator.covariates if covariates is None else covariates
    if given is None:
        raise ValueError(
            f"the model adjusts for {q} covariates; pass them (covariates=...) to predict and score, "
            "or give the estimator a covariates table indexed by sample id"
        )
    Z, _, _ = read_covariates(given, design, levels=getattr(estimator, "covariate_levels_", {}))
    if Z.shape[1] != q:
        raise ValueError(f"covariates have {Z.shape[1]} columns; the model adjusts for {q}")
    return Z


def fill_missing(values: np.ndarray, means: np.ndarray) -> np.ndarray:
    """Missing values replaced by the training means, as the fit imputed them."""
    return np.where(np.isnan(values), means, values)


__all__ = ["fill_missing", "fit_inputs", "predict_covariates"]
