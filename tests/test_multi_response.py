"""A response matrix in one pass: every width-K statistic equals K separate one-response passes.

The reference for each response is the one-response pass over its own samples (`screen_problem` on a
problem of those samples alone), itself checked against scipy and statsmodels in test_kernels_linear.py,
test_kernels_glm.py and test_workflow_screen.py; here, the pass over K responses must give the same
numbers to rounding, on an odd chunking (blocks of 64 features, sub-blocks of 24, a last block of 45),
with missing feature values, covariates and responses that leave different samples out.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats as st

from widescreen.engine import FeatureFilter, RunFolder
from widescreen.workflow import Problem, screen_problem, screen_responses

from .conftest import write_store

N, P, K = 80, 301, 4


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    rng = np.random.default_rng(7)
    X = rng.integers(0, 3, size=(N, P)).astype(np.int8)
    X[rng.random((N, P)) < 0.04] = -128  # missing dosages
    X[:, 5] = 1  # constant everywhere
    X[:, 9] = np.where(np.arange(N) < 60, 0, 2)  # constant on the first 60 samples only
    ds = write_store(tmp_path_factory.mktemp("multi") / "d.zarr", X, chunk_features=64)
    Z = np.column_stack([rng.normal(size=N), rng.uniform(20, 60, N)])
    Xf = np.where(X == -128, 1.0, X).astype(float)
    lin = Xf[:, [3, 100, 200, 250]] @ np.diag([0.8, -0.7, 0.6, 0.5]) + rng.normal(size=(N, K))
    out = rng.random((N, K)) < 0.15  # each trait misses its own samples
    out[60:, 1] = True  # response 1: the first 60 samples only (feature 9 is constant there)
    lin[out] = np.nan
    eta = Xf[:, [3, 100, 200, 250]] - 1.0
    binary = (rng.random((N, K)) < 1 / (1 + np.exp(-eta))).astype(float)
    counts = rng.poisson(np.exp(0.3 * eta + 0.5)).astype(float)
    binary[out], counts[out] = np.nan, np.nan
    return ds, Z, {"linear": lin, "logistic": binary, "poisson": counts}


def _single(ds, Y, Z, k, family, covariates, filters=None):
    """The one-response pass over the samples of response k alone (the reference)."""
    rows = np.flatnonzero(np.isfinite(Y[:, k]))
    problem = Problem.from_arrays(
        ds.path,
        Y[rows, k],
        family=family,
        covariates=None if not covariates else Z[rows],
        sample_ids=[f"s{i}" for i in rows],
    )
    if family == "logistic":
        # The response-matrix pass gives the score test for the GLM families: compare with the same
        # one-response test.
        problem = _with_score_test(problem)
    return rows, screen_problem(problem, shortlist=7, list_top=12, sub_block=24, filters=filters)


def _with_score_test(problem):
    from dataclasses import replace

    from widescreen.families import LogisticFamily

    class ScoreLogistic(LogisticFamily):
        def _prepare(self, response, covariates, offset, test="lr"):
            return super()._prepare(response, covariates, offset, test="score")

    return replace(problem, family=ScoreLogistic())


@pytest.mark.parametrize(
    "family,covariates",
    [("linear", False), ("linear", True), ("logistic", True), ("poisson", True)],
)
def test_every_response_equals_its_own_pass(data, family, covariates):
    ds, Z, Ys = data
    Y = Ys[family]
    # Filters apply per response, to the features' missing rate and frequency on its samples.
    filters = FeatureFilter(drop_missing=0.06, drop_rare=0.3) if covariates else None
    # The problem gives the store, family, covariates and samples; its own response is not used.
    base = np.nan_to_num(Y[:, 0])
    X = Problem.from_arrays(ds.path, base, family=family, covariates=Z if covariates else None)
    multi = screen_responses(
        X, Y, shortlist=7, list_top=12, sub_block=24, names=list("abcd"), filters=filters
    )
    assert [r.extra["name"] for r in multi] == list("abcd")
    for k in range(K):
        rows, one = _single(ds, Y, Z, k, family, covariates, filters)
        got, ref = multi[k].statistics, one.statistics
        assert set(got) == set(ref)
        if filters is not None:
            assert 0 < ref["filtered"].sum() < P - 50
        for c in ref:
            np.testing.assert_allclose(got[c], ref[c], rtol=1e-9, atol=1e-11, err_msg=f"{k} {c}")
        np.testing.assert_array_equal(multi[k].index, one.index)
        np.testing.assert_allclose(multi[k].score, one.score, rtol=1e-10)
        np.testing.assert_array_equal(multi[k].pass_result.topk.index, one.pass_result.topk.index)
        # The shortlist's values, imputed and centred on the response's own samples.
        np.testing.assert_allclose(multi[k].values[rows], one.values, rtol=1e-12, atol=1e-12)
        m, o = multi[k].pass_result, one.pass_result
        assert m.left_out == o.left_out
    if filters is None:
        # Feature 9 is constant on response 1's samples: no score there, a score elsewhere.
        assert multi[1].statistics["score"][9] == 0 and multi[0].statistics["score"][9] > 0


def test_linear_matches_scipy_on_each_responses_samples(data):
    # Reference: scipy.stats.pearsonr of the trait and the feature imputed by its mean over the
    # trait's own samples (no covariates).
    ds, _, Ys = data
    Y = Ys["linear"]
    res = screen_responses(
        Problem.from_arrays(ds.path, np.nan_to_num(Y[:, 0])), Y, shortlist=5, sub_block=24
    )
    X = np.asarray(ds.X[:, :40], dtype=float)
    for k in range(K):
        rows = np.isfinite(Y[:, k])
        x = np.where(X[rows] == -128, np.nan, X[rows])
        x = np.where(np.isnan(x), np.nanmean(x, axis=0), x)
        for j in (0, 3, 17, 39):
            r, p = st.pearsonr(x[:, j], Y[rows, k])
            assert res[k].statistics["correlation"][j] == pytest.approx(r, abs=1e-12)
            assert res[k].statistics["p_value"][j] == pytest.approx(p, rel=1e-8)


def test_run_folder_and_resume_are_bit_identical(data, tmp_path):
    ds, Z, Ys = data
    Y = Ys["linear"]
    problem = Problem.from_arrays(ds.path, np.nan_to_num(Y[:, 0]), covariates=Z)
    kw = {"shortlist": 7, "sub_block": 24, "keep_values": False}
    mem = screen_responses(problem, Y, **kw)
    run = RunFolder(tmp_path / "r")
    first = screen_responses(problem, Y, run=run, **kw)
    # Forget two blocks' completion markers (as a kill mid-pass leaves them) and resume.
    layout = run.layout.pass_("screen")
    for b in (1, 3):
        layout.marker(b).unlink()
    again = screen_responses(problem, Y, run=run, **kw)
    assert again[0].pass_result.blocks_reused == 3
    from widescreen.schema import read_stats

    for k in range(K):
        np.testing.assert_array_equal(first[k].index, again[k].index)
        np.testing.assert_array_equal(first[k].score, again[k].score)
        np.testing.assert_array_equal(first[k].index, mem[k].index)
        disk = read_stats(run, "screen", ("t", "p_value"), response=k)
        for c in ("t", "p_value"):
            np.testing.assert_array_equal(disk[c], mem[k].statistics[c])


def test_refusals(data):
    ds, _, Ys = data
    problem = Problem.from_arrays(ds.path, np.nan_to_num(Ys["linear"][:, 0]))
    with pytest.raises(ValueError, match="one row per analysed sample"):
        screen_responses(problem, Ys["linear"][:10])
    bad = Ys["linear"].copy()
    bad[3, 2] = np.inf
    with pytest.raises(ValueError, match=r"Y\[3, 2\] is infinite"):
        screen_responses(problem, bad)
    with pytest.raises(ValueError, match="distinct"):
        screen_responses(problem, Ys["linear"], names=["a", "a", "b", "c"])
    t = np.abs(np.nan_to_num(Ys["linear"][:, 0])) + 1
    cox = Problem.from_arrays(ds.path, t, family="cox", event=np.ones(N))
    # Cox: the responses share the times and events (they differ in their samples only).
    with pytest.raises(ValueError, match="same time in every response"):
        screen_responses(cox, Ys["linear"])


def test_mask_sums_from_lists_of_samples(data, monkeypatch):
    # Masks that leave out few samples are summed over lists of samples (the left-out ones
    # subtracted from the block's totals): the same exact integers as the masks' float32 product,
    # checked here against numpy's sums by definition, and the same statistics to the last bit.
    from widescreen.kernels import _multi
    from widescreen.store import _accel, prepare_block

    if not _accel.use_numba:
        pytest.skip("the lists of samples are summed by compiled loops")
    ds, Z, Ys = data
    rng = np.random.default_rng(3)
    raw = np.asarray(ds.X[:, :50])
    # Masks leaving out none, 5%, 30% (lists of left-out samples), 60%, 95% (lists of their own).
    masks = rng.random((N, 5)) > np.array([0.0, 0.05, 0.3, 0.6, 0.95])
    lists = _multi.MaskRows.of(masks)
    assert lists is not None and lists.complement.tolist() == [True, True, True, False, False]
    s1, s2, n_miss = _multi._gathered_sums(raw, lists)
    x = np.where(raw == -128, 0, raw).astype(np.int64)
    m = masks.T.astype(np.int64)
    np.testing.assert_array_equal(s1, m @ x)
    np.testing.assert_array_equal(s2, m @ (x * x))
    np.testing.assert_array_equal(n_miss, m @ (raw == -128))
    block = prepare_block(raw, 0, None)
    st = _multi.prepare_linear_multi(Ys["linear"], Z)
    assert st.gather is not None and st.cov_lists is not None  # the cheaper route here
    by_lists = _multi.linear_multi_statistics(block, st)
    monkeypatch.setattr(_multi, "_GATHER_COST", np.inf)
    st = _multi.prepare_linear_multi(Ys["linear"], Z)
    assert st.gather is None and st.cov_lists is None
    by_product = _multi.linear_multi_statistics(block, st)
    for c in by_product:
        # The sums are the same integers; the covariates' products, taken from shared rows and the
        # lists (`CovariateLists`), differ by rounding only.
        np.testing.assert_allclose(by_lists[c], by_product[c], rtol=1e-11, atol=1e-14, err_msg=c)
    for c in ("mean", "missing_rate", "constant", "degenerate"):
        np.testing.assert_array_equal(by_lists[c], by_product[c], err_msg=c)


def test_every_response_equals_its_own_pass_from_the_masks_product(data, monkeypatch):
    # The same comparison with the masks' sums from their float32 product and a covariate basis row
    # per mask (the route of hundreds of masks that each leave out many samples, and without numba;
    # with numba these data take the lists of samples), on the odd chunking and filters.
    from widescreen.kernels import _multi

    monkeypatch.setattr(_multi, "_GATHER_COST", np.inf)
    test_every_response_equals_its_own_pass(data, "linear", True)


@pytest.mark.parametrize("covariates", [False, True])
def test_compiled_columns_equal_the_numpy_route(data, monkeypatch, covariates):
    # The linear columns are written by one compiled loop doing the numpy route's arithmetic:
    # the same values bit for bit (constant and degenerate features included).
    from widescreen.kernels import _multi
    from widescreen.store import _accel, prepare_block

    if not _accel.use_numba:
        pytest.skip("the compiled loop needs numba")
    ds, Z, Ys = data
    monkeypatch.setattr(_accel, "FUSED_MAX_ROWS", 0)  # the same products (BLAS) for both routes
    st = _multi.prepare_linear_multi(Ys["linear"], Z if covariates else None)
    block = prepare_block(np.asarray(ds.X[:, :60]), 0, None)
    compiled = _multi.linear_multi_statistics(block, st)
    monkeypatch.setattr(_accel, "use_numba", False)
    ref = _multi.linear_multi_statistics(block, st)
    assert set(compiled) == set(ref) and ref["degenerate"].any()
    for c in ref:
        assert compiled[c].dtype == ref[c].dtype, c
        np.testing.assert_array_equal(compiled[c], ref[c], err_msg=c)
