"""Information criteria: BIC and the extended BIC of Chen & Chen (2008), Biometrika 95:759.

``k`` counts the selected features only. The intercept and the unpenalised covariates are in every
model on a path, so they add the same constant to every value and cannot change the choice.
"""

from __future__ import annotations

import numpy as np
from scipy import special

__all__ = ["bic", "default_ebic_gamma", "ebic", "log_binomial"]


def log_binomial(p, k) -> np.ndarray:
    """``log C(p, k)`` through log-gamma functions, elementwise."""
    p = np.asarray(p, dtype=np.float64)
    k = np.asarray(k, dtype=np.float64)
    if np.any(k < 0) or np.any(k > p):
        raise ValueError("log C(p, k) needs 0 <= k <= p.")
    return special.gammaln(p + 1.0) - special.gammaln(k + 1.0) - special.gammaln(p - k + 1.0)


def bic(log_likelihood, k, n: int) -> np.ndarray:
    """``-2 log L + k log n`` (Schwarz 1978)."""
    return -2.0 * np.asarray(log_likelihood, dtype=np.float64) + np.asarray(k) * np.log(n)


def ebic(log_likelihood, k, n: int, p: int, gamma: float) -> np.ndarray:
    """Extended BIC ``-2 log L + k log n + 2 gamma log C(p, k)``.

    Parameters
    ----------
    log_likelihood : array_like of shape (L,)
    k : array_like of int of shape (L,)
        Number of selected features of each model.
    n : int
        Number of samples.
    p : int
        Number of candidate features the models were chosen from. After screening this is the number
        of features screened, not the length of the shortlist.
    gamma : float
        In [0, 1]; 0 gives BIC.
    """
    if not 0.0 <= gamma <= 1.0:
        raise ValueError(f"The EBIC 'gamma' must be in [0, 1]; got {gamma}.")
    return bic(log_likelihood, k, n) + 2.0 * gamma * log_binomial(p, k)


def default_ebic_gamma(n: int, p: int) -> float:
    """Default EBIC gamma ``max(0, 1 - 1 / (2 kappa))`` with ``kappa = log p / log n``.

    Chen & Chen (2008, Theorem 1) show EBIC selection consistent when ``p = O(n^kappa)`` and
    ``gamma > 1 - 1 / (2 kappa)``; we take that bound itself, which grows towards 1 as p outgrows n
    (n = 100: 0.67 at p = 1000, 0.83 at p = 10^6) and falls to 0 (plain BIC) once p <= sqrt(n).
    Pass ``gamma = 1`` for the most conservative choice.
    """
    if n < 2 or p < 1:
        raise ValueError(f"default_ebic_gamma needs n >= 2 and p >= 1; got n = {n}, p = {p}.")
    if p == 1:
        return 0.0
    kappa = np.log(p) / np.log(n)
    return float(np.clip(1.0 - 1.0 / (2.0 * kappa), 0.0, 1.0))
