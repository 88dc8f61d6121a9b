"""The Cox score test of K responses in one pass (same times and events, each on its own samples).

Reference: statsmodels' PHReg (Breslow ties) on the samples of each response alone, the feature's
missing values imputed by its mean over those samples: the null model (covariates only) fitted by
PHReg, then U and the efficient information I = -H_xx + H_xz H_zz^-1 H_zx from PHReg's ``score`` and
``hessian`` at (gamma_hat, b = 0); the Rao score statistic is U^2 / I (Cox & Hinkley 1974, ch. 9).
"""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.duration.hazard_regression import PHReg

from widescreen.workflow import Problem, screen_responses

from .conftest import write_store

N, P = 70, 45


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    rng = np.random.default_rng(11)
    X = rng.integers(0, 3, size=(N, P)).astype(np.int8)
    X[rng.random((N, P)) < 0.05] = -128  # missing dosages
    X[:, 4] = 1  # constant everywhere
    ds = write_store(tmp_path_factory.mktemp("coxmulti") / "d.zarr", X, chunk_features=16)
    Z = np.column_stack([rng.normal(size=N), rng.uniform(20, 60, N)])
    Xf = np.where(X == -128, 1.0, X).astype(float)
    time = np.round(rng.exponential(np.exp(-0.6 * Xf[:, 2] + 0.4 * Xf[:, 30])), 1) + 0.1  # ties
    event = (rng.random(N) < 0.75).astype(float)
    masks = np.ones((N, 3), bool)
    masks[rng.permutation(N)[: N // 2], 0] = False  # a half-sample
    masks[:, 1] = ~masks[:, 0]  # its complement
    masks[np.arange(N) % 5 == 2, 2] = False  # a training fold
    Y = np.where(masks, time[:, None], np.nan)
    return ds, X, Z, time, event, Y


def _reference(X, Z, time, event, rows, j):
    """chi2 and U of the score test of feature j on the samples ``rows`` (statsmodels PHReg)."""
    x = np.where(X[rows, j] == -128, np.nan, X[rows, j]).astype(float)
    x = np.where(np.isnan(x), np.nanmean(x), x)
    t, d = time[rows], event[rows]
    if Z is None:
        model = PHReg(t, x[:, None], status=d, ties="breslow")
        U, H = model.score(np.zeros(1))[0], model.hessian(np.zeros(1))
        return U * U / -H[0, 0], U
    z = Z[rows]
    gamma = PHReg(t, z, status=d, ties="breslow").fit().params
    full = PHReg(t, np.column_stack([z, x]), status=d, ties="breslow")
    b = np.append(gamma, 0.0)
    U, H = full.score(b)[-1], -full.hessian(b)
    info = H[-1, -1] - H[-1, :-1] @ np.linalg.solve(H[:-1, :-1], H[:-1, -1])
    return U * U / info, U


@pytest.mark.parametrize("covariates", [False, True])
def test_each_response_equals_phreg_score_test(data, covariates):
    ds, X, Z, time, event, Y = data
    Zc = Z if covariates else None
    problem = Problem.from_arrays(ds.path, time, family="cox", event=event, covariates=Zc)
    res = screen_responses(problem, Y, shortlist=5, sub_block=7)
    for k in range(Y.shape[1]):
        rows = np.flatnonzero(np.isfinite(Y[:, k]))
        s = res[k].statistics
        assert s["score"][4] == 0 and s["p_value"][4] == 1
        for j in [0, 2, 13, 16, 30, 44]:
            chi2, U = _reference(X, Zc, time, event, rows, j)
            assert s["score_chi2"][j] == pytest.approx(chi2, rel=1e-7)
            assert s["score"][j] == pytest.approx(chi2 / 2, rel=1e-7)
            assert np.sign(s["z"][j]) == np.sign(U)
        # The strongest features by the score test, as the shortlist gives them.
        chi = s["score_chi2"]
        assert list(res[k].index) == list(np.argsort(-chi, kind="stable")[:5])


def test_refuses_responses_with_different_times(data):
    ds, _, _, time, event, Y = data
    bad = Y.copy()
    bad[np.isfinite(bad[:, 2]), 2] += 1.0
    problem = Problem.from_arrays(ds.path, time, family="cox", event=event)
    with pytest.raises(ValueError, match="same time in every response"):
        screen_responses(problem, bad)
