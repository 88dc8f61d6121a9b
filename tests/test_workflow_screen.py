"""End-to-end screening: outcome join, ranking table, run folder, against outside references."""

from __future__ import annotations

import json

import numpy as np
import pytest
import scipy.stats as st
import statsmodels.api as sm

from widescreen.report import read_tsv
from widescreen.store import OutcomeError
from widescreen.workflow import ScreenConfig, screen, shortlist_size

from .conftest import write_outcome, write_store


def test_shortlist_auto_matches_published_default():
    # d = floor(n / log n) (Fan & Lv 2008, from memory); 37 for n = 200 and 119 for n = 800 [derived, CHECKS.md]
    assert shortlist_size("auto", 200) == 37
    assert shortlist_size("auto", 800) == 119
    assert shortlist_size(10, 200, n_features=5) == 5
    with pytest.raises(ValueError, match="positive integer or 'auto'"):
        shortlist_size(-3, 200)


@pytest.fixture
def study(tmp_path, rng):
    n, p = 120, 700
    X = rng.normal(size=(n, p)).astype(np.float32)
    X[rng.random((n, p)) < 0.02] = np.nan
    X[:, 11] = 1.5  # a constant feature
    age = rng.uniform(20, 60, n)
    Xf = np.where(np.isnan(X), np.nanmean(X, axis=0), X).astype(np.float64)
    y = 1.2 * Xf[:, 3] - 0.9 * Xf[:, 400] + 0.05 * age + rng.normal(size=n)
    ds = write_store(tmp_path / "d.zarr", X, chunk_features=128)
    ids = [f"s{i}" for i in range(n)]
    y_txt = [repr(float(v)) for v in y]
    y_txt[5] = "NA"  # dropped and counted
    ids_out = [*ids, "ghost1"]
    cols = {"y": [*y_txt, "0.5"], "age": [*(repr(float(a)) for a in age), "30"]}
    order = rng.permutation(n + 1)  # any row order
    table = write_outcome(tmp_path / "o.tsv", ids_out, cols, order)
    keep = np.arange(n) != 5
    # Imputation uses the analysed samples only (the one without a response is not one of them).
    Xk = X[keep].astype(np.float64)
    Xk = np.where(np.isnan(Xk), np.nanmean(Xk, axis=0), Xk)
    return ds, table, Xk, y[keep], age[keep]


def test_screen_matches_scipy_pearson(tmp_path, study):
    ds, table, Xf, y, _ = study
    res = screen(
        ds.path, table, ScreenConfig(response="y", shortlist=10, list_top=50), tmp_path / "run"
    )
    rank = read_tsv(tmp_path / "run" / "ranking.tsv")
    idx = rank["index"].astype(int)
    # Reference: scipy.stats.pearsonr on the mean-imputed matrix of the joined samples.
    ref = np.array(
        [st.pearsonr(Xf[:, j], y) if j != 11 else (0.0, 1.0) for j in range(Xf.shape[1])]
    )
    np.testing.assert_allclose(
        rank["correlation"].astype(float), ref[idx, 0], rtol=1e-8, atol=1e-12
    )
    np.testing.assert_allclose(rank["p_value"].astype(float), ref[idx, 1], rtol=1e-7)
    expected_order = np.lexsort((np.arange(Xf.shape[1]), -np.abs(ref[:, 0])))[:50]
    np.testing.assert_array_equal(idx, expected_order)
    assert set(res.index[:2]) == {3, 400}
    assert 11 not in idx
    m = json.loads((tmp_path / "run" / "manifest.json").read_text())
    assert m["status"] == "complete"
    assert m["samples"]["n_dropped_missing"] == 1
    assert m["samples"]["unknown_ids_first"] == ["ghost1"]
    assert m["samples"]["n_analysed"] == Xf.shape[0]
    assert m["dataset"]["fingerprint"] == ds.fingerprint()


def test_screen_with_covariates_matches_statsmodels_ols(tmp_path, study):
    ds, table, Xf, y, age = study
    screen(
        ds.path,
        table,
        ScreenConfig(response="y", covariates=("age",), shortlist=5, list_top=20),
        tmp_path / "r",
    )
    rank = read_tsv(tmp_path / "r" / "ranking.tsv")
    for j, t in zip(rank["index"].astype(int)[:8], rank["t"].astype(float)[:8], strict=True):
        # Reference: statsmodels OLS t value of x_j in y ~ 1 + age + x_j.
        fit = sm.OLS(y, sm.add_constant(np.column_stack([age, Xf[:, j]]))).fit()
        assert t == pytest.approx(fit.tvalues[2], rel=1e-8)


def test_constant_feature_scores_zero_not_nan(tmp_path, study):
    ds, table, *_ = study
    res = screen(ds.path, table, ScreenConfig(response="y", shortlist=5), tmp_path / "r")
    from widescreen.engine import read_stats

    stats = read_stats(res.run, "screen")
    assert stats["score"][11] == 0.0
    assert np.isfinite(stats["score"]).all()
    assert res.pass_result.n_constant == 1


def test_outcome_errors_name_file_and_line(tmp_path, study):
    ds, *_ = study
    bad = tmp_path / "bad.tsv"
    bad.write_text("sample\ty\ns0\t1\ns1\t2\t3\n")
    with pytest.raises(OutcomeError, match=r"bad.tsv: line 3: 3 fields"):
        screen(ds.path, bad, ScreenConfig(response="y"), tmp_path / "r1")
    bad.write_text("sample\ty\ns0\t1\ns0\t2\n")
    with pytest.raises(OutcomeError, match=r"'s0' appears twice \(lines 2 and 3\)"):
        screen(ds.path, bad, ScreenConfig(response="y"), tmp_path / "r2")
    bad.write_text("sample\ty\n" + "".join(f"s{i}\t{i}\n" for i in range(20)) + "s20\tabc\n")
    with pytest.raises(OutcomeError, match=r"column 'y', line 22: 'abc' is not a number"):
        screen(ds.path, bad, ScreenConfig(response="y"), tmp_path / "r3")
    with pytest.raises(OutcomeError, match="no column 'height'"):
        screen(ds.path, bad, ScreenConfig(response="height"), tmp_path / "r4")
    bad.write_text("sample\ty\nx1\t1\nx2\t2\n")
    with pytest.raises(OutcomeError, match="none of its 2 sample ids are in the store"):
        screen(ds.path, bad, ScreenConfig(response="y"), tmp_path / "r5")


def test_rerun_resumes_and_refuses_other_config(tmp_path, study):
    from widescreen.engine import RunFolderError

    ds, table, *_ = study
    cfg = ScreenConfig(response="y", shortlist=5)
    first = screen(ds.path, table, cfg, tmp_path / "r")
    text = (tmp_path / "r" / "ranking.tsv").read_text()
    again = screen(ds.path, table, cfg, tmp_path / "r")
    assert again.pass_result.blocks_reused == first.pass_result.blocks_computed
    assert (tmp_path / "r" / "ranking.tsv").read_text() == text
    with pytest.raises(RunFolderError, match=r"shortlist: 5 -> 6"):
        screen(ds.path, table, ScreenConfig(response="y", shortlist=6), tmp_path / "r")
    screen(ds.path, table, ScreenConfig(response="y", shortlist=6), tmp_path / "r", restart=True)
