"""Marginal logistic and Poisson kernels against statsmodels GLM fitted one feature at a time.

Every test runs twice: with the compiled sums of a Newton step (when numba is installed) and with numpy.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats as ss
import statsmodels.api as sm

from widescreen.kernels import _tiles
from widescreen.kernels._glm import (
    logistic_statistics,
    poisson_statistics,
    prepare_logistic,
    prepare_poisson,
)
from widescreen.store import _accel
from widescreen.store._reader import prepare_block

ROUTES = [pytest.param(False, id="numpy")]
if _accel.HAVE_NUMBA:
    ROUTES.insert(0, pytest.param(True, id="numba"))


@pytest.fixture(params=ROUTES, autouse=True)
def route(request, monkeypatch):
    monkeypatch.setattr(_accel, "use_numba", request.param)
    return request.param


FAMILIES = {
    "logistic": (prepare_logistic, logistic_statistics, sm.families.Binomial),
    "poisson": (prepare_poisson, poisson_statistics, sm.families.Poisson),
}


def _design(rng, n=200, p=20):
    """Continuous, dosage-coded, binary and skewed features; covariates; an exposure-like offset."""
    X = rng.standard_normal((n, p))
    X[:, 3] = rng.integers(0, 3, n)
    X[:, 4] = rng.integers(0, 2, n)
    X[:, 5] = rng.exponential(size=n)
    X[:, 6] = 5.0 + 0.01 * rng.standard_normal(n)  # small spread around a large level
    Z = np.column_stack([rng.standard_normal(n), rng.integers(0, 2, n)])
    offset = rng.uniform(-0.5, 0.5, n)
    return X, Z, offset


def _outcome(family, rng, X, Z, offset):
    eta = -0.3 + 0.6 * X[:, 0] - 0.4 * X[:, 3] + 0.5 * Z[:, 0] + offset
    if family == "logistic":
        return (rng.random(X.shape[0]) < 1 / (1 + np.exp(-eta))).astype(float)
    return rng.poisson(np.exp(eta)).astype(float)


def _statsmodels_marginal(family, y, X, Z, offset, scale=None):
    """beta, se, LR chi2 of x_j from statsmodels GLM joint fits y ~ 1 + Z + x_j (the reference).

    ``scale``: a fixed dispersion for the full fits (the quasi-Poisson check); the LR is then divided by it.
    """
    fam = FAMILIES[family][2]()
    n = y.shape[0]
    base = np.zeros(n) if offset is None else offset
    C = np.ones((n, 1)) if Z is None else np.column_stack([np.ones(n), Z])
    null = sm.GLM(y, C, family=fam, offset=base).fit(tol=1e-14)
    out = []
    for j in range(X.shape[1]):
        ex = np.column_stack([C, X[:, j]])
        full = sm.GLM(y, ex, family=fam, offset=base).fit(tol=1e-14, scale=scale)
        # deviance difference = 2 (llf_full - llf_null) of the plain model (statsmodels' llf would
        # carry the fixed scale)
        out.append(
            [full.params[-1], full.bse[-1], (null.deviance - full.deviance) / (scale or 1.0)]
        )
    return np.array(out)


@pytest.mark.parametrize("family", ["logistic", "poisson"])
@pytest.mark.parametrize(
    ("covariates", "use_offset"), [(False, False), (True, False), (False, True), (True, True)]
)
def test_marginal_fits_equal_statsmodels_glm(rng, family, covariates, use_offset):
    X, Z, offset = _design(rng)
    X[:, 0] += 0.8 * Z[:, 0]  # a feature correlated with a covariate: the adjustment matters
    y = _outcome(family, rng, X, Z, offset)
    Z = Z if covariates else None
    offset = offset if use_offset else None
    prepare, statistics, _ = FAMILIES[family]
    res = statistics(prepare_block(X, 0), prepare(y, Z, offset))
    # statsmodels GLM (Binomial / Poisson) joint fits y ~ 1 + Z + x_j, IRLS to a tight tolerance, per
    # feature: beta and its Wald standard error from the full fit, the likelihood-ratio statistic
    # 2 (llf_full - llf_null) and its chi-square(1) p-value.
    ref = _statsmodels_marginal(family, y, X, Z, offset)
    np.testing.assert_allclose(res["beta"], ref[:, 0], rtol=1e-6)
    np.testing.assert_allclose(res["std_error"], ref[:, 1], rtol=1e-6)
    np.testing.assert_allclose(res["lr_chi2"], ref[:, 2], rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(res["z"], ref[:, 0] / ref[:, 1], rtol=1e-6)
    # p-value of the likelihood ratio: chi-square with 1 df (scipy.stats.chi2)
    np.testing.assert_allclose(res["p_value"], ss.chi2.sf(ref[:, 2], 1), rtol=1e-5, atol=1e-12)
    np.testing.assert_allclose(res["score"], ref[:, 2] / 2, rtol=1e-6, atol=1e-9)
    # beta per standard deviation (population sd, numpy ddof=0)
    np.testing.assert_allclose(res["std_beta"], ref[:, 0] * X.std(axis=0), rtol=1e-6)
    assert res["converged"].all() and not res["degenerate"].any()


@pytest.mark.parametrize("family", ["logistic", "poisson"])
def test_small_tiles_and_shrinking_working_set_give_the_same_fits(rng, monkeypatch, family):
    X, Z, offset = _design(rng, n=150, p=45)
    X[:, 10:20] *= 3.0  # stronger columns converge later: the working set shrinks
    y = _outcome(family, rng, X, Z, offset)
    prepare, statistics, _ = FAMILIES[family]
    monkeypatch.setattr(
        _tiles, "TILE_BYTES", 16 * 150 * 8
    )  # tiles of 16 columns, the last one ragged
    res = statistics(prepare_block(X, 0), prepare(y, Z))
    ref = _statsmodels_marginal(family, y, X, Z, None)  # statsmodels GLM joint fits per feature
    np.testing.assert_allclose(res["beta"], ref[:, 0], rtol=1e-6)
    np.testing.assert_allclose(res["lr_chi2"], ref[:, 2], rtol=1e-6, atol=1e-9)


def test_missing_values_are_fitted_as_mean_imputed(rng):
    X, _, _ = _design(rng, n=180, p=8)
    y = _outcome("logistic", rng, X, np.zeros((180, 2)), np.zeros(180))
    Xm = X.copy()
    Xm[rng.random(X.shape) < 0.1] = np.nan
    res = logistic_statistics(prepare_block(Xm, 0), prepare_logistic(y))
    imputed = np.where(np.isnan(Xm), np.nanmean(Xm, axis=0), Xm)
    ref = _statsmodels_marginal("logistic", y, imputed, None, None)  # statsmodels GLM
    np.testing.assert_allclose(res["beta"], ref[:, 0], rtol=1e-6)
    np.testing.assert_allclose(res["lr_chi2"], ref[:, 2], rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("family", ["logistic", "poisson"])
@pytest.mark.parametrize(
    ("covariates", "use_offset"), [(False, False), (False, True), (True, True)]
)
def test_score_test_equals_statsmodels_score_test(rng, family, covariates, use_offset):
    X, Z, offset = _design(rng)
    y = _outcome(family, rng, X, Z, offset)
    Z = Z if covariates else None
    offset = offset if use_offset else None
    prepare, statistics, fam = FAMILIES[family]
    res = statistics(prepare_block(X, 0), prepare(y, Z, offset, test="score"))
    C = np.ones((y.size, 1)) if Z is None else sm.add_constant(Z, has_constant="add")
    null = sm.GLM(y, C, family=fam(), offset=offset).fit(tol=1e-14)
    # statsmodels GLMResults.score_test: Rao score test of adding one column to the null model
    ref = np.array([null.score_test(exog_extra=X[:, [j]])[0] for j in range(X.shape[1])]).ravel()
    np.testing.assert_allclose(res["score_chi2"], ref, rtol=1e-8)
    np.testing.assert_allclose(res["p_value"], ss.chi2.sf(ref, 1), rtol=1e-6, atol=1e-12)
    np.testing.assert_allclose(res["score"], ref / 2, rtol=1e-8)
    # U / I: the one-step estimate from the null fit (hand computation from statsmodels' fit)
    mu = null.fittedvalues
    w = mu * (1 - mu) if family == "logistic" else mu
    Xc = X - X.mean(axis=0)
    u = Xc.T @ (y - mu)
    proj = Xc - C @ np.linalg.solve(C.T @ (C * w[:, None]), C.T @ (Xc * w[:, None]))
    info = np.einsum("ij,ij,i->j", proj, proj, w)
    np.testing.assert_allclose(res["beta"], u / info, rtol=1e-8)
    np.testing.assert_allclose(res["std_error"], 1 / np.sqrt(info), rtol=1e-8)


@pytest.mark.parametrize("family", ["logistic", "poisson"])
@pytest.mark.parametrize("test", ["lr", "score"])
def test_constant_features_score_zero_and_nothing_is_nan(rng, family, test):
    n = 120
    raw = rng.integers(0, 3, (n, 8)).astype(np.int8)
    raw[:, 2] = 1  # constant
    raw[:, 5] = -128  # all missing
    raw[: n // 2, 6] = -128  # constant among the observed values
    raw[n // 2 :, 6] = 2
    y = (rng.random(n) < 0.5).astype(float) if family == "logistic" else rng.poisson(2, n) * 1.0
    prepare, statistics, _ = FAMILIES[family]
    res = statistics(prepare_block(raw, 0), prepare(y, test=test))
    dead = np.array([2, 5, 6])
    # common practice: a feature without variation carries no evidence (score 0, p-value 1)
    assert np.all(res["score"][dead] == 0) and np.all(res["p_value"][dead] == 1)
    assert np.all(res["beta"][dead] == 0) and np.all(res["degenerate"][dead])
    assert not res["degenerate"][[0, 1, 3, 4, 7]].any()
    for key, val in res.items():
        assert not np.isnan(np.asarray(val, dtype=float)).any(), key


def test_separating_feature_is_flagged(rng):
    n = 200
    y = (rng.random(n) < 0.5).astype(float)
    X = rng.standard_normal((n, 5))
    X[:, 1] = y + 0.1 * rng.random(n)  # complete separation: x > 1 exactly when y = 1
    X[:, 3] = np.where(
        y == 1, rng.integers(1, 3, n), rng.integers(0, 2, n)
    )  # quasi-complete (x = 1 both)
    res = logistic_statistics(prepare_block(X, 0), prepare_logistic(y))
    # Albert & Anderson (1984): with (quasi-)complete separation the MLE does not exist (|beta| -> inf)
    assert res["separated"][[1, 3]].all()
    assert not res["separated"][[0, 2, 4]].any()
    assert np.all(np.isfinite(res["beta"])) and np.all(np.isfinite(res["lr_chi2"]))
    # A separating feature is strong evidence, not a degenerate one: it keeps a positive utility.
    assert not res["degenerate"].any() and np.all(
        res["score"][[1, 3]] > res["score"][[0, 2, 4]].max()
    )


def test_feature_carried_by_the_only_case_is_separated_not_degenerate(rng):
    n = 60
    y = np.zeros(n)
    y[7] = 1.0
    X = rng.standard_normal((n, 3))
    X[:, 1] = 0.0
    X[7, 1] = 1.0  # carried by the single case: complete separation
    res = logistic_statistics(prepare_block(X, 0), prepare_logistic(y))
    assert res["separated"].tolist() == [False, True, False]
    assert not res["degenerate"][1] and res["score"][1] > 0 and res["beta"][1] > 10
    # statsmodels GLM hits the same boundary: its deviance there is ~0, so the likelihood ratio is
    # the null deviance (within the tolerance at which the fit stopped)
    null = sm.GLM(y, np.ones((n, 1)), family=sm.families.Binomial()).fit()
    np.testing.assert_allclose(res["lr_chi2"][1], null.deviance, rtol=1e-3)
    for key, val in res.items():
        assert not np.isnan(np.asarray(val, dtype=float)).any(), key


def test_non_convergence_is_reported_not_raised(rng):
    X, Z, offset = _design(rng, n=150, p=10)
    X[:, 0] *= 4.0
    y = _outcome("logistic", rng, X, Z, offset)
    res = logistic_statistics(prepare_block(X, 0), prepare_logistic(y, max_iter=1))
    assert not res["converged"].all()
    assert np.all(res["n_iter"] <= 1)
    for key in ("beta", "std_error", "lr_chi2", "p_value", "score"):
        assert np.all(np.isfinite(res[key])), key


@pytest.mark.parametrize("family", ["logistic", "poisson"])
def test_true_signal_ranks_first(rng, family):
    # Fan & Song (2010): the marginal likelihood reduction ranks an active feature above the noise
    n, p = 300, 500
    X = rng.standard_normal((n, p))
    eta = 1.0 * X[:, 123] - (0.5 if family == "logistic" else 0.0)
    y = (
        (rng.random(n) < 1 / (1 + np.exp(-eta))) * 1.0
        if family == "logistic"
        else rng.poisson(np.exp(eta)) * 1.0
    )
    prepare, statistics, _ = FAMILIES[family]
    for test in ("lr", "score"):
        res = statistics(prepare_block(X, 0), prepare(y, test=test))
        assert np.argmax(res["score"]) == 123
        assert res["p_value"][123] < 1e-6


@pytest.mark.parametrize("test", ["lr", "score"])
def test_quasi_poisson_equals_statsmodels_with_pearson_scale(rng, test):
    # Overdispersed counts (gamma-Poisson mixture, variance about 2.5 times the mean).
    X, Z, _ = _design(rng, n=300, p=12)
    mu = np.exp(0.5 + 0.3 * Z[:, 0] + 0.4 * X[:, 0])
    y = rng.poisson(mu * rng.gamma(2.0, 0.5, mu.size)).astype(float)
    st = prepare_poisson(y, Z, test=test, dispersion="pearson")
    res = poisson_statistics(prepare_block(X, 0), st)
    # statsmodels GLM(Poisson).fit(scale="X2") on the null model y ~ 1 + Z: Pearson chi2 / df_resid
    C = sm.add_constant(Z, has_constant="add")
    phi = sm.GLM(y, C, family=sm.families.Poisson()).fit(tol=1e-14, scale="X2").scale
    assert phi > 1.5  # the data are overdispersed, so the check is not the plain Poisson one
    np.testing.assert_allclose(st.dispersion, phi, rtol=1e-10)
    if test == "lr":
        # statsmodels joint fits with that fixed scale: Wald se = sqrt(phi) x model se; the
        # quasi-likelihood ratio is the deviance difference over phi, chi-square(1)
        ref = _statsmodels_marginal("poisson", y, X, Z, None, scale=phi)
        np.testing.assert_allclose(res["beta"], ref[:, 0], rtol=1e-6)
        np.testing.assert_allclose(res["std_error"], ref[:, 1], rtol=1e-6)
        np.testing.assert_allclose(res["lr_chi2"], ref[:, 2], rtol=1e-6, atol=1e-9)
        stat = ref[:, 2]
    else:
        # statsmodels GLMResults.score_test of the null fitted with scale="X2" (score / phi)
        null = sm.GLM(y, C, family=sm.families.Poisson()).fit(tol=1e-14, scale="X2")
        stat = np.array([null.score_test(exog_extra=X[:, [j]])[0] for j in range(12)]).ravel()
        np.testing.assert_allclose(res["score_chi2"], stat, rtol=1e-8)
    np.testing.assert_allclose(res["p_value"], ss.chi2.sf(stat, 1), rtol=1e-5, atol=1e-12)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"y": np.array([0.0, 1.0, 2.0])}, "lie in"),
        ({"y": np.zeros((3, 2))}, "1-D"),
        ({"y": np.array([0.0, 1.0, 1.0]), "offset": np.zeros(4)}, "offset"),
        ({"y": np.array([0.0, 1.0, 1.0]), "covariates": np.zeros((4, 1))}, "covariates"),
        ({"y": np.array([0.0, 1.0, 1.0]), "max_iter": 0}, "max_iter"),
        ({"y": np.array([0.0, 1.0, 1.0]), "test": "wald"}, "test"),
    ],
)
def test_bad_input_raises_a_clear_error(kwargs, message):
    with pytest.raises(ValueError, match=message):
        prepare_logistic(**kwargs)


def test_poisson_rejects_negative_counts_and_block_size_mismatch(rng):
    with pytest.raises(ValueError, match="non-negative"):
        prepare_poisson(np.array([1.0, -1.0, 2.0]))
    st = prepare_poisson(rng.poisson(1.0, 50) + 1.0)
    with pytest.raises(ValueError, match="samples"):
        poisson_statistics(prepare_block(rng.standard_normal((40, 3)), 0), st)
    with pytest.raises(ValueError, match="logistic state"):
        logistic_statistics(prepare_block(rng.standard_normal((50, 3)), 0), st)


def test_covariates_that_separate_the_outcome_are_refused(rng):
    y = (rng.random(80) < 0.5).astype(float)
    with pytest.raises(ValueError, match="separate"):
        prepare_logistic(y, covariates=y[:, None] + 0.01 * rng.random((80, 1)))


def test_collinear_covariates_are_refused(rng):
    y = (rng.random(60) < 0.5).astype(float)
    z = rng.standard_normal(60)
    with pytest.raises(ValueError, match="collinear"):
        prepare_logistic(y, covariates=np.column_stack([z, 2 * z]))
    with pytest.raises(ValueError, match="collinear"):
        prepare_poisson(y + 1, covariates=np.ones((60, 1)))


@pytest.mark.parametrize("dispersion", ["sandwich", "quadratic"])
@pytest.mark.parametrize("covariates", [False, True])
def test_robust_score_tests_equal_statistics_from_statsmodels_pieces(rng, covariates, dispersion):
    X, Z, _ = _design(rng, n=300, p=12)
    mu = np.exp(0.5 + 0.3 * Z[:, 0] + 0.4 * X[:, 0])
    y = rng.poisson(mu * rng.gamma(2.0, 0.5, mu.size)).astype(float)  # overdispersed counts
    Z = Z if covariates else None
    res = poisson_statistics(
        prepare_block(X, 0), prepare_poisson(y, Z, test="score", dispersion=dispersion)
    )
    C = np.ones((y.size, 1)) if Z is None else sm.add_constant(Z, has_constant="add")
    null = sm.GLM(y, C, family=sm.families.Poisson()).fit(tol=1e-14)
    mu = null.fittedvalues
    # Generalized (robust) score test, Boos 1992 (Am. Stat. 46:327): U = efficient score of x at the
    # null fit, V = sum_i (s_ix - B s_igamma)^2 with B = H_xgamma H_gammagamma^-1, from statsmodels'
    # per-observation scores (GLM.score_obs) and Hessian (GLM.hessian) of y ~ 1 + Z + x at b = 0.
    # "quadratic": (y_i - mu_i)^2 replaced by the variance function a mu + b mu^2 fitted to them by
    # non-negative least squares (Cameron & Trivedi 1990's auxiliary regression; scipy.optimize.nnls).
    if dispersion == "quadratic":
        from scipy.optimize import nnls

        # weighted by 1 / v^2 and refitted until the weights settle (a gamma quasi-likelihood)
        A = np.column_stack([mu, mu**2])
        v = mu
        for _ in range(200):
            v = A @ nnls(A / v[:, None], (y - mu) ** 2 / v)[0]
    else:
        v = (y - mu) ** 2
    ref = []
    for j in range(12):
        ext = sm.GLM(y, np.column_stack([C, X[:, j]]), family=sm.families.Poisson())
        theta = np.append(null.params, 0.0)
        s_obs = ext.score_obs(theta)
        H = -ext.hessian(theta)
        B = np.linalg.solve(H[:-1, :-1], H[:-1, -1])
        eff = s_obs[:, -1] - s_obs[:, :-1] @ B
        xt = eff / (y - mu)  # the efficient score per observation is x~_i (y_i - mu_i)
        ref.append(eff.sum() ** 2 / np.sum(xt**2 * v))
    ref = np.array(ref)
    np.testing.assert_allclose(res["score_chi2"], ref, rtol=1e-6)
    np.testing.assert_allclose(res["p_value"], ss.chi2.sf(ref, 1), rtol=1e-5, atol=1e-12)
    if dispersion != "sandwich":
        return
    # statsmodels' own score_test(cov_type="HC0") centres the score contributions; under the null the
    # two agree to first order (here within 2% off the one true feature)
    hc0 = [null.score_test(exog_extra=X[:, [j]], cov_type="HC0")[0] for j in range(1, 12)]
    np.testing.assert_allclose(res["score_chi2"][1:], np.ravel(hc0), rtol=0.02)


def test_batched_newton_steps_equal_dense_solves(rng):
    """The batched Newton steps (compiled or numpy, by the route) against numpy.linalg.solve per system.

    Regular systems give H^-1 g and g' H^-1 g; a non-finite system or one without information on b gets
    no step; a singular Schur complement gets the damped step (Schur complement + 1e-6 trace(H)).
    """
    from widescreen.kernels._batched import last_variance, newton_steps

    m, p = 12, 5
    B = rng.standard_normal((m, p, 2 * p))
    H = B @ B.transpose(0, 2, 1) + 0.1 * np.eye(p)
    g = rng.standard_normal((m, p))
    H[3, 0, 1] = np.nan
    H[4, -1, -1] = 0.0
    H[5, -1, :] = H[5, :, -1] = 2.0 * H[5, 0, :]  # b's column a multiple of the first: singular
    H[5, -1, -1] = 4.0 * H[5, 0, 0]
    step, lam, ok = newton_steps(H, g)
    regular = np.setdiff1d(np.arange(m), [3, 4, 5])
    ref = np.linalg.solve(H[regular], g[regular][:, :, None])[:, :, 0]  # numpy.linalg.solve
    np.testing.assert_allclose(step[regular], ref, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(lam[regular], np.einsum("ij,ij->i", g[regular], ref), rtol=1e-9)
    assert ok[regular].all() and not ok[[3, 4]].any() and np.all(step[[3, 4]] == 0.0)
    # Damped: with s = 0 the step solves H + tau e_b e_b' (tau = 1e-6 trace H), by numpy.linalg.solve
    tau = 1e-6 * np.trace(H[5])
    damped = np.linalg.solve(H[5] + tau * np.outer(np.eye(p)[-1], np.eye(p)[-1]), g[5])
    np.testing.assert_allclose(step[5], damped, rtol=1e-5)
    # Variance of b: the last diagonal element of H^-1 (numpy.linalg.inv)
    var = last_variance(H)
    np.testing.assert_allclose(var[regular], np.linalg.inv(H[regular])[:, -1, -1], rtol=1e-9)
    assert np.isnan(var[3])
