"""Losses of the penalised fits as pluggable objects: Gaussian, binomial, Poisson and Cox.

A loss sees the response ``y`` and a linear predictor ``eta`` of shape (n,) (offset included) and
supplies what the path solver needs:

- ``deviance(y, eta)``: the fitted objective is ``deviance / (2 n) + penalty``; for the Gaussian loss the
  deviance is the residual sum of squares, so this is scikit-learn's lasso scaling.
- ``log_likelihood(y, eta)``: for BIC / EBIC (the Gaussian one profiles out the variance).
- ``working(y, eta)``: the working response ``z`` and weights ``w`` of iteratively reweighted least
  squares. With ``g`` the score of the log-likelihood in ``eta`` and ``w`` (a diagonal approximation of)
  its negative Hessian, ``z = eta + g / w``. A fixed point of IRLS solves the penalised problem whatever
  the Hessian approximation, since the gradient of the working least-squares problem at ``eta`` is ``-g``.
- ``heldout_deviance(y, eta, test)``: cross-validation score of a fold.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

__all__ = ["BinomialLoss", "CoxLoss", "GaussianLoss", "Loss", "PoissonLoss", "make_loss"]

# Floor of IRLS weights: keeps the working response finite where the fit is (nearly) degenerate.
_MIN_WEIGHT = 1e-10


class Loss:
    """Base of the loss objects.

    Attributes
    ----------
    name : str
        Short name used in results.
    has_intercept : bool
        Whether the model has an intercept (not for the Cox partial likelihood, where it cancels).
    quadratic : bool
        True when the working problem does not depend on ``eta`` (the Gaussian loss: one IRLS step).
    """

    name: str = "loss"
    has_intercept: bool = True
    quadratic: bool = False

    def check_response(self, y) -> np.ndarray:
        """Validate the response and return it as float64 of shape (n,) (Cox: (n, 2))."""
        y = np.asarray(y, dtype=np.float64)
        if y.ndim != 1:
            raise ValueError(
                f"The response 'y' of the {self.name} loss must be 1-D; got shape {y.shape}."
            )
        if not np.all(np.isfinite(y)):
            raise ValueError(f"The response 'y' of the {self.name} loss has non-finite values.")
        return y

    def deviance(self, y: np.ndarray, eta: np.ndarray) -> float:
        raise NotImplementedError

    def log_likelihood(self, y: np.ndarray, eta: np.ndarray) -> float:
        raise NotImplementedError

    def working(self, y: np.ndarray, eta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Working response ``z`` and weights ``w``, each of shape (n,)."""
        raise NotImplementedError

    def initial_eta(self, y: np.ndarray) -> np.ndarray:
        """A starting linear predictor of shape (n,) for the unpenalised null fit."""
        return np.zeros(y.shape[0])

    def mean(self, eta: np.ndarray) -> np.ndarray:
        """The mean response (inverse link) at ``eta``."""
        raise NotImplementedError

    def heldout_deviance(self, y: np.ndarray, eta: np.ndarray, test: np.ndarray) -> float:
        """Deviance of the held-out rows ``test`` (bool of shape (n,)) under ``eta`` of shape (n,)."""
        return self.deviance(y[test], eta[test])


@dataclass(frozen=True)
class GaussianLoss(Loss):
    """Squared error; the deviance is the residual sum of squares."""

    name = "gaussian"
    quadratic = True

    def deviance(self, y, eta):
        r = y - eta
        return float(r @ r)

    def log_likelihood(self, y, eta):
        # Variance profiled out: -n/2 (log(2 pi RSS / n) + 1), the form statsmodels' OLS reports.
        n = y.shape[0]
        rss = max(self.deviance(y, eta), 1e-300)
        return -0.5 * n * (np.log(2.0 * np.pi * rss / n) + 1.0)

    def working(self, y, eta):
        return y, np.ones_like(y)

    def initial_eta(self, y):
        return np.full(y.shape[0], y.mean())

    def mean(self, eta):
        return eta


@dataclass(frozen=True)
class BinomialLoss(Loss):
    """Logistic regression for a 0/1 response."""

    name = "binomial"

    def check_response(self, y):
        y = super().check_response(y)
        if not np.all((y == 0) | (y == 1)):
            raise ValueError("The response 'y' of the binomial loss must contain only 0 and 1.")
        return y

    def log_likelihood(self, y, eta):
        return float(y @ eta - np.logaddexp(0.0, eta).sum())

    def deviance(self, y, eta):
        # The saturated log-likelihood of 0/1 data is 0.
        return -2.0 * self.log_likelihood(y, eta)

    def working(self, y, eta):
        mu = special.expit(eta)
        w = np.maximum(mu * (1.0 - mu), _MIN_WEIGHT)
        return eta + (y - mu) / w, w

    def initial_eta(self, y):
        # R's glm starting value for the binomial family: mu = (y + 0.5) / 2.
        return special.logit((y + 0.5) / 2.0)

    def mean(self, eta):
        return special.expit(eta)


@dataclass(frozen=True)
class PoissonLoss(Loss):
    """Poisson regression with the log link for a count response."""

    name = "poisson"

    def check_response(self, y):
        y = super().check_response(y)
        if np.any(y < 0):
            raise ValueError("The response 'y' of the Poisson loss must be >= 0.")
        return y

    @staticmethod
    def _mu(eta):
        # exp overflows past ~709; a capped mean only ever occurs on the way to divergence.
        return np.exp(np.minimum(eta, 700.0))

    def log_likelihood(self, y, eta):
        return float(y @ eta - self._mu(eta).sum() - special.gammaln(y + 1.0).sum())

    def deviance(self, y, eta):
        mu = self._mu(eta)
        return float(2.0 * np.sum(special.xlogy(y, y) - y * eta - (y - mu)))

    def working(self, y, eta):
        mu = self._mu(eta)
        w = np.maximum(mu, _MIN_WEIGHT)
        return eta + (y - mu) / w, w

    def initial_eta(self, y):
        # R's glm starting value for the Poisson family: mu = y + 0.1.
        return np.log(y + 0.1)

    def mean(self, eta):
        return self._mu(eta)


@dataclass(frozen=True)
class CoxLoss(Loss):
    """Cox proportional hazards partial likelihood with Breslow's handling of ties.

    The response is an array of shape (n, 2): column 0 the follow-up time, column 1 the event
    indicator (1 event, 0 censored). ``l(eta) = sum_i d_i (eta_i - log sum_{j: t_j >= t_i} exp(eta_j))``.
    IRLS uses the diagonal of the negative Hessian (as glmnet's Cox fit does, Simon et al. 2011).
    """

    name = "cox"
    has_intercept = False

    def check_response(self, y):
        y = np.asarray(y, dtype=np.float64)
        if y.ndim != 2 or y.shape[1] != 2:
            raise ValueError(
                f"The response 'y' of the Cox loss must have shape (n, 2) (time, event); got {y.shape}."
            )
        if not np.all(np.isfinite(y)):
            raise ValueError("The response 'y' of the Cox loss has non-finite values.")
        if not np.all((y[:, 1] == 0) | (y[:, 1] == 1)):
            raise ValueError("The event column y[:, 1] of the Cox loss must contain only 0 and 1.")
        if y[:, 1].sum() == 0:
            raise ValueError("The Cox loss needs at least one event (y[:, 1] == 1).")
        return y

    @staticmethod
    def _parts(y, eta):
        """Sorted quantities of the partial likelihood; returns (order, d, r, S, first, last, inverse)."""
        order = np.argsort(y[:, 0], kind="stable")
        t, d = y[order, 0], y[order, 1]
        e = eta[order]
        # Shifting eta leaves every ratio exp(eta_k) / S_i unchanged and avoids overflow.
        r = np.exp(e - e.max())
        _, first, inverse = np.unique(t, return_index=True, return_inverse=True)
        last = np.r_[first[1:] - 1, t.shape[0] - 1]
        # Risk-set sums: all j with t_j >= t_i, so tied times share the sum from their first member.
        S = np.cumsum(r[::-1])[::-1][first][inverse]
        return order, d, e - e.max(), r, S, last, inverse

    def log_likelihood(self, y, eta):
        _, d, e, _, S, _, _ = self._parts(y, eta)
        return float(d @ (e - np.log(S)))

    def deviance(self, y, eta):
        return -2.0 * self.log_likelihood(y, eta)

    def working(self, y, eta):
        order, d, _, r, S, last, inverse = self._parts(y, eta)
        # For observation k: sums over the events i whose risk set holds k (t_i <= t_k, ties included).
        A = np.cumsum(d / S)[last][inverse]
        B = np.cumsum(d / S**2)[last][inverse]
        g = d - r * A
        h = r * A - r**2 * B
        w_sorted = np.maximum(h, _MIN_WEIGHT)
        z_sorted = np.where(h > _MIN_WEIGHT, g / w_sorted, 0.0)
        z = np.empty_like(eta)
        w = np.empty_like(eta)
        z[order] = z_sorted
        w[order] = np.where(h > _MIN_WEIGHT, w_sorted, 0.0)
        return eta + z, w

    def mean(self, eta):
        # The relative risk exp(eta); the baseline hazard is not estimated.
        return np.exp(eta)

    def heldout_deviance(self, y, eta, test):
        # Cross-validated partial likelihood of Verweij & van Houwelingen (1993), Stat. Med. 12:2305:
        # l(all data) - l(training data), both at the coefficients fitted without the held-out fold.
        train = ~test
        return -2.0 * (self.log_likelihood(y, eta) - self.log_likelihood(y[train], eta[train]))


_BY_NAME = {
    "gaussian": GaussianLoss,
    "binomial": BinomialLoss,
    "logistic": BinomialLoss,
    "poisson": PoissonLoss,
    "cox": CoxLoss,
}


def make_loss(loss: str | Loss) -> Loss:
    """Turn a name (``"gaussian"``, ``"binomial"``, ``"poisson"``, ``"cox"``) into a loss object."""
    if isinstance(loss, Loss):
        return loss
    if not isinstance(loss, str) or loss.lower() not in _BY_NAME:
        raise ValueError(
            f"The 'loss' must be one of {sorted(_BY_NAME)} or a Loss object; got {loss!r}."
        )
    return _BY_NAME[loss.lower()]()
