"""Validated, standardised input of a penalised fit."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ._losses import Loss
from ._quadratic import check_unpenalized_rank


def _as_matrix(a, name: str, n: int | None = None) -> np.ndarray:
    a = np.asarray(a, dtype=np.float64)
    if a.ndim == 1 and name == "unpenalized":
        a = a[:, None]
    if a.ndim != 2:
        raise ValueError(
            f"The '{name}' array must be 2-D (n_samples, n_columns); got shape {a.shape}."
        )
    if n is not None and a.shape[0] != n:
        raise ValueError(
            f"The '{name}' array has {a.shape[0]} rows; expected {n} (one per sample)."
        )
    if not np.all(np.isfinite(a)):
        bad = np.argwhere(~np.isfinite(a))[0]
        raise ValueError(
            f"The '{name}' array has a non-finite value (first at row {bad[0]}, column {bad[1]})."
        )
    return a


@dataclass(frozen=True)
class Problem:
    """The data of a fit after validation and standardisation.

    Attributes
    ----------
    X : ndarray of shape (n, d)
        Features as given.
    y : ndarray of shape (n,) or (n, 2)
        Response as validated by the loss.
    Z : ndarray of shape (n, q)
        Unpenalised covariates as given (q may be 0).
    offset : ndarray of shape (n,)
        Known part of the linear predictor.
    loss : Loss
    Xs : ndarray of shape (n, d)
        Centred columns scaled to unit variance (divisor n); constant columns are all zero.
    mean, scale : ndarray of shape (d,)
        Column means and standard deviations (1 for constant columns).
    constant : ndarray of bool of shape (d,)
        Columns without variation; they never enter the model.
    C : ndarray of shape (n, q + 1) or (n, q)
        Unpenalised design: a column of ones (when the loss has an intercept) followed by Z.
    """

    X: np.ndarray = field(repr=False)
    y: np.ndarray = field(repr=False)
    Z: np.ndarray = field(repr=False)
    offset: np.ndarray = field(repr=False)
    loss: Loss
    Xs: np.ndarray = field(repr=False)
    mean: np.ndarray = field(repr=False)
    scale: np.ndarray = field(repr=False)
    constant: np.ndarray = field(repr=False)
    C: np.ndarray = field(repr=False)

    @property
    def n(self) -> int:
        return self.X.shape[0]

    @property
    def d(self) -> int:
        return self.X.shape[1]

    @classmethod
    def build(cls, X, y, loss: Loss, unpenalized=None, offset=None) -> Problem:
        X = _as_matrix(X, "X")
        n, d = X.shape
        if d == 0:
            raise ValueError("The feature matrix 'X' has no columns.")
        y = loss.check_response(y)
        if y.shape[0] != n:
            raise ValueError(f"The response 'y' has {y.shape[0]} samples; 'X' has {n} rows.")
        Z = np.empty((n, 0)) if unpenalized is None else _as_matrix(unpenalized, "unpenalized", n)
        if offset is None:
            off = np.zeros(n)
        else:
            off = np.asarray(offset, dtype=np.float64)
            if off.shape != (n,) or not np.all(np.isfinite(off)):
                raise ValueError(
                    f"The 'offset' must be a finite array of shape ({n},); got shape {off.shape}."
                )
        C = np.column_stack([np.ones(n), Z]) if loss.has_intercept else Z
        if C.shape[1] >= n:
            raise ValueError(
                f"{C.shape[1]} unpenalised columns (intercept included) need more than {n} samples."
            )
        check_unpenalized_rank(C)
        mean = X.mean(axis=0)
        sd = X.std(axis=0)
        # Relative test: a column of one repeated large value has a rounding-level spread.
        constant = sd <= 1e-12 * np.maximum(np.abs(mean), 1.0)
        scale = np.where(constant, 1.0, sd)
        Xs = (X - mean) / scale
        Xs[:, constant] = 0.0
        return cls(X, y, Z, off, loss, Xs, mean, scale, constant, C)

    def subset(self, rows: np.ndarray) -> Problem:
        """The same problem on a subset of the samples, standardised afresh (for cross-validation)."""
        return Problem.build(self.X[rows], self.y[rows], self.loss, self.Z[rows], self.offset[rows])
