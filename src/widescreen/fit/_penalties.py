"""Penalties: value functions, derivatives, orthonormal-design thresholding rules and penalty objects.

Everything here acts elementwise on arrays of any shape. Penalised objectives are written as

    (1 / n) * negative log-likelihood + sum_j p_lambda(|beta_j|)

on the standardised scale, so that for an orthonormal design (X^T X = n I) and the Gaussian loss the
problem separates into ``min_b 0.5 (b - z_j)^2 + p_lambda(|b|)`` with ``z_j = x_j^T y / n``, whose
solution is the thresholding rule of the penalty.

Folded concave penalties (SCAD, MCP) are fitted by the local linear approximation (Zou & Li 2008,
Ann. Statist. 36:1509): a weighted lasso with weights ``p'_lambda(|beta^(0)|) / lambda`` at the current
estimate, iterated. A coefficient past ``a lambda`` (SCAD) or ``gamma lambda`` (MCP) gets weight zero and
is unpenalised.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

__all__ = [
    "MCP",
    "SCAD",
    "AdaptiveLasso",
    "Dantzig",
    "ElasticNet",
    "Lasso",
    "Penalty",
    "elastic_net_penalty",
    "lasso_penalty",
    "make_penalty",
    "mcp_derivative",
    "mcp_penalty",
    "mcp_threshold",
    "scad_derivative",
    "scad_penalty",
    "scad_threshold",
    "soft_threshold",
]


def _check_lambda(lam: float) -> float:
    lam = float(lam)
    if not np.isfinite(lam) or lam < 0:
        raise ValueError(f"The penalty level lambda must be finite and >= 0; got {lam}.")
    return lam


def soft_threshold(z: np.ndarray, lam: float) -> np.ndarray:
    """Soft thresholding ``sign(z) (|z| - lam)_+``, the lasso rule for an orthonormal design."""
    lam = _check_lambda(lam)
    z = np.asarray(z, dtype=np.float64)
    return np.sign(z) * np.maximum(np.abs(z) - lam, 0.0)


def lasso_penalty(t: np.ndarray, lam: float) -> np.ndarray:
    """Lasso penalty ``lam |t|``."""
    return _check_lambda(lam) * np.abs(np.asarray(t, dtype=np.float64))


def elastic_net_penalty(t: np.ndarray, lam: float, l1_ratio: float) -> np.ndarray:
    """Elastic net penalty ``lam (l1_ratio |t| + 0.5 (1 - l1_ratio) t^2)`` (scikit-learn's scaling)."""
    lam = _check_lambda(lam)
    t = np.asarray(t, dtype=np.float64)
    return lam * (l1_ratio * np.abs(t) + 0.5 * (1.0 - l1_ratio) * t**2)


def _check_concavity(value: float, lower: float, name: str) -> float:
    value = float(value)
    if not np.isfinite(value) or value <= lower:
        raise ValueError(f"The {name} parameter must be a finite number > {lower}; got {value}.")
    return value


def scad_penalty(t: np.ndarray, lam: float, a: float = 3.7) -> np.ndarray:
    """SCAD penalty of Fan & Li (2001), JASA 96:1348.

    ``lam |t|`` for ``|t| <= lam``; ``-(t^2 - 2 a lam |t| + lam^2) / (2 (a - 1))`` for
    ``lam < |t| <= a lam``; ``(a + 1) lam^2 / 2`` beyond.
    """
    lam, a = _check_lambda(lam), _check_concavity(a, 2.0, "SCAD 'a'")
    t = np.abs(np.asarray(t, dtype=np.float64))
    middle = -(t**2 - 2.0 * a * lam * t + lam**2) / (2.0 * (a - 1.0))
    return np.where(t <= lam, lam * t, np.where(t <= a * lam, middle, 0.5 * (a + 1.0) * lam**2))


def scad_derivative(t: np.ndarray, lam: float, a: float = 3.7) -> np.ndarray:
    """Derivative ``p'_lam(|t|)`` of the SCAD penalty: ``lam`` up to ``lam``, ``(a lam - |t|)_+ / (a - 1)`` beyond."""
    lam, a = _check_lambda(lam), _check_concavity(a, 2.0, "SCAD 'a'")
    t = np.abs(np.asarray(t, dtype=np.float64))
    return np.where(t <= lam, lam, np.maximum(a * lam - t, 0.0) / (a - 1.0))


def scad_threshold(z: np.ndarray, lam: float, a: float = 3.7) -> np.ndarray:
    """SCAD thresholding rule for an orthonormal design (Fan & Li 2001, eq. 2.8).

    ``sign(z)(|z| - lam)_+`` for ``|z| <= 2 lam``; ``((a - 1) z - sign(z) a lam) / (a - 2)`` for
    ``2 lam < |z| <= a lam``; ``z`` beyond.
    """
    lam, a = _check_lambda(lam), _check_concavity(a, 2.0, "SCAD 'a'")
    z = np.asarray(z, dtype=np.float64)
    az = np.abs(z)
    middle = ((a - 1.0) * z - np.sign(z) * a * lam) / (a - 2.0)
    return np.where(az <= 2.0 * lam, soft_threshold(z, lam), np.where(az <= a * lam, middle, z))


def mcp_penalty(t: np.ndarray, lam: float, gamma: float = 3.0) -> np.ndarray:
    """Minimax concave penalty of Zhang (2010), Ann. Statist. 38:894.

    ``lam |t| - t^2 / (2 gamma)`` for ``|t| <= gamma lam``, ``gamma lam^2 / 2`` beyond.
    """
    lam, gamma = _check_lambda(lam), _check_concavity(gamma, 1.0, "MCP 'gamma'")
    t = np.abs(np.asarray(t, dtype=np.float64))
    return np.where(t <= gamma * lam, lam * t - t**2 / (2.0 * gamma), 0.5 * gamma * lam**2)


def mcp_derivative(t: np.ndarray, lam: float, gamma: float = 3.0) -> np.ndarray:
    """Derivative ``p'_lam(|t|) = (lam - |t| / gamma)_+`` of the MCP."""
    lam, gamma = _check_lambda(lam), _check_concavity(gamma, 1.0, "MCP 'gamma'")
    t = np.abs(np.asarray(t, dtype=np.float64))
    return np.maximum(lam - t / gamma, 0.0)


def mcp_threshold(z: np.ndarray, lam: float, gamma: float = 3.0) -> np.ndarray:
    """Firm thresholding, the MCP rule for an orthonormal design (Zhang 2010).

    ``sign(z)(|z| - lam)_+ gamma / (gamma - 1)`` for ``|z| <= gamma lam``, ``z`` beyond.
    """
    lam, gamma = _check_lambda(lam), _check_concavity(gamma, 1.0, "MCP 'gamma'")
    z = np.asarray(z, dtype=np.float64)
    return np.where(np.abs(z) <= gamma * lam, soft_threshold(z, lam) * gamma / (gamma - 1.0), z)


# --------------------------------------------------------------------------------------------------
# Penalty objects: what the path solver needs to know about each penalty.


class Penalty:
    """Base of the penalty objects.

    Attributes
    ----------
    name : str
        Short name used in results.
    l1_ratio : float
        Share of the l1 part (1 for everything but the elastic net).
    concave : bool
        True for penalties fitted by the local linear approximation (weights change with the estimate).
    """

    name: str = "penalty"
    l1_ratio: float = 1.0
    concave: bool = False

    def value(self, t: np.ndarray, lam: float) -> np.ndarray:
        """Penalty ``p_lam(|t|)`` elementwise."""
        raise NotImplementedError

    def lla_weights(self, abs_coef: np.ndarray, lam: float) -> np.ndarray:
        """Weights ``p'_lam(|beta|) / lam`` of the local linear approximation (concave penalties only)."""
        raise NotImplementedError(
            f"the {self.name} penalty is not fitted by the local linear approximation"
        )

    def threshold(self, z: np.ndarray, lam: float) -> np.ndarray:
        """Solution for an orthonormal design, ``argmin_b 0.5 (b - z)^2 + p_lam(|b|)`` elementwise."""
        raise NotImplementedError


@dataclass(frozen=True)
class Lasso(Penalty):
    """The lasso, ``lam |t|`` (Tibshirani 1996)."""

    name = "lasso"

    def value(self, t, lam):
        return lasso_penalty(t, lam)

    def threshold(self, z, lam):
        return soft_threshold(z, lam)


@dataclass(frozen=True)
class ElasticNet(Penalty):
    """Elastic net ``lam (l1_ratio |t| + 0.5 (1 - l1_ratio) t^2)``, scikit-learn's parametrisation."""

    l1_ratio: float = 0.5
    name = "enet"

    def __post_init__(self):
        if not 0.0 < float(self.l1_ratio) <= 1.0:
            raise ValueError(f"The elastic net 'l1_ratio' must be in (0, 1]; got {self.l1_ratio}.")

    def value(self, t, lam):
        return elastic_net_penalty(t, lam, self.l1_ratio)

    def threshold(self, z, lam):
        return soft_threshold(z, lam * self.l1_ratio) / (1.0 + lam * (1.0 - self.l1_ratio))


@dataclass(frozen=True)
class AdaptiveLasso(Penalty):
    """Adaptive lasso of Zou (2006), JASA 101:1418: ``lam w_j |t_j|`` with ``w_j = 1 / |beta_init_j|^gamma``.

    Parameters
    ----------
    gamma : float
        Exponent of the weights (> 0); Zou uses 0.5, 1 or 2.
    init : {"ridge", "lasso"} or ndarray of shape (d,)
        Initial estimate, on the standardised scale of the columns:

        - ``"ridge"``: ridge regression (for GLMs, ridge IRLS) with its level chosen by generalised
          cross-validation (Golub, Heath & Wahba 1979); dense, so every feature keeps a finite weight.
        - ``"lasso"``: the lasso path tuned by BIC; features it leaves at zero get an infinite weight and
          stay out of the model (Zou 2006, Section 3.5).
        - an array: initial coefficients on the original scale of ``X`` (converted internally).
    """

    gamma: float = 1.0
    init: Literal["ridge", "lasso"] | tuple[float, ...] = "ridge"
    name = "adaptive_lasso"

    def __post_init__(self):
        _check_concavity(self.gamma, 0.0, "adaptive lasso 'gamma'")
        if isinstance(self.init, str):
            if self.init not in ("ridge", "lasso"):
                raise ValueError(
                    f"The adaptive lasso 'init' must be 'ridge', 'lasso' or an array; got {self.init!r}."
                )
        else:
            # Stored as a tuple so that the frozen object stays hashable and comparable.
            init = np.asarray(self.init, dtype=np.float64)
            if init.ndim != 1 or not np.all(np.isfinite(init)):
                raise ValueError("The adaptive lasso 'init' array must be 1-D and finite.")
            object.__setattr__(self, "init", tuple(init.tolist()))

    def value(self, t, lam):
        # The unweighted value; the weights live with the fit.
        return lasso_penalty(t, lam)

    def threshold(self, z, lam):
        return soft_threshold(z, lam)


@dataclass(frozen=True)
class SCAD(Penalty):
    """SCAD (Fan & Li 2001) with concavity ``a`` (default 3.7, their Bayes-risk choice)."""

    a: float = 3.7
    name = "scad"
    concave = True

    def __post_init__(self):
        _check_concavity(self.a, 2.0, "SCAD 'a'")

    def value(self, t, lam):
        return scad_penalty(t, lam, self.a)

    def lla_weights(self, abs_coef, lam):
        return scad_derivative(abs_coef, lam, self.a) / lam

    def threshold(self, z, lam):
        return scad_threshold(z, lam, self.a)


@dataclass(frozen=True)
class MCP(Penalty):
    """Minimax concave penalty (Zhang 2010) with concavity ``gamma`` (default 3)."""

    gamma: float = 3.0
    name = "mcp"
    concave = True

    def __post_init__(self):
        _check_concavity(self.gamma, 1.0, "MCP 'gamma'")

    def value(self, t, lam):
        return mcp_penalty(t, lam, self.gamma)

    def lla_weights(self, abs_coef, lam):
        return mcp_derivative(abs_coef, lam, self.gamma) / lam

    def threshold(self, z, lam):
        return mcp_threshold(z, lam, self.gamma)


@dataclass(frozen=True)
class Dantzig(Penalty):
    """Dantzig selector (Candes & Tao 2007, Ann. Statist. 35:2313), Gaussian loss only.

    ``min ||beta||_1`` subject to ``||X^T (y - X beta)||_inf / n <= lam`` on the standardised columns
    (after projecting out the intercept and unpenalised covariates), solved as a linear programme.
    """

    name = "dantzig"

    def value(self, t, lam):
        return lasso_penalty(t, lam)

    def threshold(self, z, lam):
        return soft_threshold(z, lam)


_BY_NAME = {
    "lasso": Lasso,
    "enet": ElasticNet,
    "elastic_net": ElasticNet,
    "adaptive_lasso": AdaptiveLasso,
    "scad": SCAD,
    "mcp": MCP,
    "dantzig": Dantzig,
}


def make_penalty(penalty: str | Penalty, **params) -> Penalty:
    """Turn a name (``"lasso"``, ``"enet"``, ``"adaptive_lasso"``, ``"scad"``, ``"mcp"``, ``"dantzig"``)
    and its parameters into a penalty object; a penalty object passes through unchanged."""
    if isinstance(penalty, Penalty):
        if params:
            raise ValueError(
                f"Penalty parameters {sorted(params)} given with a penalty object; set them on the object."
            )
        return penalty
    if not isinstance(penalty, str) or penalty.lower() not in _BY_NAME:
        raise ValueError(
            f"The 'penalty' must be one of {sorted(_BY_NAME)} or a Penalty object; got {penalty!r}."
        )
    return _BY_NAME[penalty.lower()](**params)
