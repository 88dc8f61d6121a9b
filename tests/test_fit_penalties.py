"""Penalty functions, thresholding rules and fits on an orthonormal design.

References: SCAD (Fan & Li 2001, JASA 96:1348) and MCP (Zhang 2010, Ann. Statist. 38:894) closed forms
and the [derived] values listed in CHECKS.md.
"""

import numpy as np
import pytest

from widescreen.fit import (
    MCP,
    SCAD,
    ElasticNet,
    SolverOptions,
    fit_path,
    make_penalty,
    mcp_derivative,
    mcp_penalty,
    mcp_threshold,
    scad_derivative,
    scad_penalty,
    scad_threshold,
    soft_threshold,
)


def test_scad_threshold_published_values():
    # CHECKS.md [derived from Fan & Li 2001, eq. 2.8], lambda = 1, a = 3.7.
    z = np.array([0.5, 1.5, 2.0, 3.0, 3.7, 5.0, -3.0])
    expected = np.array([0.0, 0.5, 1.0, 2.588235, 3.7, 5.0, -2.588235])
    np.testing.assert_allclose(scad_threshold(z, 1.0), expected, atol=1e-6)


def test_scad_penalty_published_values():
    # CHECKS.md [derived from Fan & Li 2001], lambda = 1, a = 3.7.
    t = np.array([0.5, 2.0, 3.7, 5.0])
    np.testing.assert_allclose(scad_penalty(t, 1.0), [0.5, 1.814815, 2.35, 2.35], atol=1e-6)
    np.testing.assert_allclose(scad_penalty(-t, 1.0), scad_penalty(t, 1.0))


def test_mcp_threshold_published_values():
    # CHECKS.md [derived from Zhang 2010, firm thresholding], lambda = 1, gamma = 3.
    z = np.array([1.5, 2.0, 3.0, 5.0])
    np.testing.assert_allclose(mcp_threshold(z, 1.0), [0.75, 1.5, 3.0, 5.0], atol=1e-12)
    np.testing.assert_allclose(mcp_threshold(-z, 1.0), -mcp_threshold(z, 1.0))


def test_mcp_penalty_closed_form():
    # Zhang (2010): lam|t| - t^2/(2 gamma) up to gamma lam, gamma lam^2 / 2 beyond; lam = 0.7, gamma = 3.
    lam, g = 0.7, 3.0
    t = np.array([0.0, 0.3, 1.0, 2.1, 3.0])
    expected = np.where(t <= g * lam, lam * t - t**2 / (2 * g), g * lam**2 / 2)
    np.testing.assert_allclose(mcp_penalty(t, lam, g), expected, rtol=1e-14)
    assert mcp_penalty(2.1, lam, g) == pytest.approx(0.5 * g * lam**2)  # continuous at gamma lam


@pytest.mark.parametrize(
    ("penalty", "threshold"),
    [
        (lambda t, lam: scad_penalty(t, lam, 3.7), lambda z, lam: scad_threshold(z, lam, 3.7)),
        (lambda t, lam: mcp_penalty(t, lam, 3.0), lambda z, lam: mcp_threshold(z, lam, 3.0)),
        (lambda t, lam: lam * np.abs(t), soft_threshold),
    ],
)
def test_threshold_minimises_the_penalised_square(penalty, threshold):
    # The thresholding rule is argmin_b 0.5 (b - z)^2 + p(|b|) (Fan & Li 2001, Section 2): brute force
    # over a fine grid, from the published penalty formulas.
    lam = 0.8
    grid = np.linspace(-8, 8, 160_001)
    for z in [-5.0, -2.1, -1.0, -0.3, 0.0, 0.5, 1.2, 1.9, 2.5, 2.96, 3.5, 6.0]:
        objective = 0.5 * (grid - z) ** 2 + penalty(grid, lam)
        assert threshold(z, lam) == pytest.approx(grid[np.argmin(objective)], abs=2e-4)


def test_derivatives_match_the_penalty_slope():
    # p'_lambda from the published formulas, checked by central differences away from the kinks.
    lam, h = 1.1, 1e-6
    t = np.array([0.2, 0.9, 1.5, 2.5, 3.9, 5.0])
    for p, dp in [(scad_penalty, scad_derivative), (mcp_penalty, mcp_derivative)]:
        numeric = (p(t + h, lam) - p(t - h, lam)) / (2 * h)
        np.testing.assert_allclose(dp(t, lam), numeric, atol=1e-6)


def test_bad_penalty_parameters_raise():
    with pytest.raises(ValueError, match="SCAD 'a'"):
        SCAD(a=2.0)
    with pytest.raises(ValueError, match="MCP 'gamma'"):
        MCP(gamma=1.0)
    with pytest.raises(ValueError, match="l1_ratio"):
        ElasticNet(l1_ratio=0.0)
    with pytest.raises(ValueError, match="penalty"):
        make_penalty("ridge")
    with pytest.raises(ValueError, match="lambda"):
        scad_penalty(1.0, -1.0)


def _orthonormal_design(n=200, d=8, seed=3):
    rng = np.random.default_rng(seed)
    A = rng.standard_normal((n, d))
    A -= A.mean(axis=0)
    Q, _ = np.linalg.qr(A)
    X = np.sqrt(n) * Q  # mean 0, X^T X = n I, so standardisation leaves it unchanged
    beta = np.array([0.0, 0.5, 1.5, 2.0, 2.5, 3.2, 4.5, -2.6])
    y = X @ beta + 0.3 * rng.standard_normal(n) + 5.0
    return X, y, X.T @ (y - y.mean()) / n


@pytest.mark.parametrize(
    ("name", "rule"),
    [
        ("scad", lambda z, lam: scad_threshold(z, lam, 3.7)),
        ("mcp", lambda z, lam: mcp_threshold(z, lam, 3.0)),
        ("lasso", soft_threshold),
        ("enet", lambda z, lam: soft_threshold(z, 0.5 * lam) / (1 + 0.5 * lam)),
    ],
)
def test_fit_on_orthonormal_design_equals_thresholding(name, rule):
    # With X^T X = n I the penalised least squares separates into the thresholding rules of
    # Fan & Li (2001) / Zhang (2010) applied to z = X^T y / n.
    X, y, z = _orthonormal_design()
    np.testing.assert_allclose(X.T @ X / X.shape[0], np.eye(X.shape[1]), atol=1e-12)
    opts = SolverOptions(tol=1e-14, outer_tol=1e-13, lla_max_iter=500, outer_max_iter=500)
    lambdas = [2.0, 1.2, 1.0, 0.8, 0.55]
    path = fit_path(X, y, penalty=name, lambdas=lambdas, options=opts)
    assert path.converged.all()
    for i, lam in enumerate(path.lambdas):
        np.testing.assert_allclose(path.coefs[i], rule(z, lam), atol=1e-9)
    # The thresholds put coefficients in every region of the SCAD rule at lambda = 1.
    region = np.digitize(np.abs(z), [1.0, 2.0, 3.7])
    assert set(region) == {0, 1, 2, 3}
