"""The pass engine on odd chunkings, missing values and constant columns, against scipy and numpy."""

from __future__ import annotations

import json
from dataclasses import replace

import numpy as np
import pytest
import scipy.stats as st

from widescreen.engine import (
    ArraySource,
    FeatureFilter,
    PassSpec,
    RunFolder,
    RunFolderError,
    TopK,
    as_source,
    block_topk,
    build_pass,
    merge_all,
    read_columns,
    read_stats,
    run_pass,
)
from widescreen.kernels._linear import linear_statistics, prepare_linear
from widescreen.store import MISSING_INT8

from .conftest import write_store


def _dosages(rng, n, p, missing=0.02):
    af = rng.uniform(0.05, 0.5, size=p)
    X = rng.binomial(2, af, size=(n, p)).astype(np.int8)
    X[rng.random((n, p)) < missing] = MISSING_INT8
    X[:, 7] = 1  # a constant column
    return X


def _imputed(X):
    """Mean-imputed, centred float64 columns (common practice for screening; DEVELOPERS.md)."""
    x = X.astype(np.float64)
    miss = X == MISSING_INT8
    x[miss] = np.nan
    mean = np.nanmean(x, axis=0)
    x = x - mean
    x[miss] = 0.0
    return x, mean, miss.mean(axis=0)


@pytest.fixture
def data(tmp_path, rng):
    n, p = 90, 1000  # chunks of 64 features: the last block holds 40
    X = _dosages(rng, n, p)
    y = X[:, 300].astype(float).clip(0) * 1.5 + rng.standard_normal(n)
    ds = write_store(tmp_path / "x.zarr", X, chunk_features=64)
    return X, y, as_source(ds)


def _spec(y, keep=25, **kw):
    return PassSpec(
        name="screen",
        kernel=linear_statistics,
        state=prepare_linear(y),
        columns=("score", "correlation", "t", "p_value"),
        keep=keep,
        **kw,
    )


def test_pass_matches_scipy_on_odd_chunking(data):
    X, y, src = data
    res = run_pass(src, _spec(y, sub_block=48), scheduler="sync")
    xc, mean, miss = _imputed(X)
    for j in (0, 63, 64, 300, 999):
        # Pearson correlation of the imputed feature with y (scipy.stats.pearsonr)
        r, p = st.pearsonr(xc[:, j], y)
        assert res.stats["correlation"][j] == pytest.approx(r, abs=1e-12)
        assert res.stats["p_value"][j] == pytest.approx(p, rel=1e-9)
    np.testing.assert_allclose(res.stats["mean"], mean, atol=1e-12)
    np.testing.assert_allclose(res.stats["missing_rate"], miss, atol=0)
    assert res.stats["score"][7] == 0.0 and res.n_constant == 1
    assert res.blocks_computed == src.n_blocks == 16 and res.blocks_reused == 0
    # top k = the strongest |r| by a plain numpy sort (ties by index), constant column excluded
    r_all = np.array([st.pearsonr(xc[:, j], y)[0] if j != 7 else 0.0 for j in range(X.shape[1])])
    order = np.lexsort((np.arange(X.shape[1]), -np.abs(r_all)))[:25]
    np.testing.assert_array_equal(res.topk.index, order)
    assert res.topk.index[0] == 300
    # kept values are the imputed, centred columns
    np.testing.assert_allclose(res.topk.values, xc[:, res.topk.index], atol=1e-12)


def test_run_folder_and_memory_give_the_same_pass(data, tmp_path):
    _X, y, src = data
    mem = run_pass(src, _spec(y), scheduler="threads")
    run = RunFolder(tmp_path / "run")
    disk = run_pass(src, _spec(y), run, scheduler="threads")
    stats = read_stats(run, "screen")
    for c, v in mem.stats.items():
        np.testing.assert_array_equal(stats[c], v)
    np.testing.assert_array_equal(disk.topk.index, mem.topk.index)
    np.testing.assert_array_equal(disk.topk.score, mem.topk.score)
    np.testing.assert_array_equal(disk.topk.values, mem.topk.values)
    meta = json.loads((run.pass_dir("screen") / "pass.json").read_text())
    assert meta["n_blocks"] == 16 and meta["sub_block"] == 64  # capped at the chunk width
    assert len(run.done_blocks("screen")) == 16
    # A second call reuses every block and reads the kept values back bit-identically.
    again = run_pass(src, _spec(y), run, scheduler="threads")
    assert (again.blocks_reused, again.blocks_computed) == (16, 0)
    np.testing.assert_array_equal(again.topk.values, mem.topk.values)
    np.testing.assert_array_equal(again.topk.score, mem.topk.score)


def test_resume_from_some_markers_is_bit_identical(data, tmp_path):
    _X, y, src = data
    run = RunFolder(tmp_path / "run")
    full = run_pass(src, _spec(y, sub_block=32), run)
    ref = read_stats(run, "screen")
    done = run.pass_dir("screen") / "done"
    for i in (0, 3, 4, 15):  # pretend these blocks never finished
        (done / f"{i}.json").unlink()
    part = run_pass(src, _spec(y, sub_block=32), run)
    assert (part.blocks_reused, part.blocks_computed) == (12, 4)
    for c, v in read_stats(run, "screen").items():
        np.testing.assert_array_equal(v.view(np.uint64), ref[c].view(np.uint64))
    np.testing.assert_array_equal(part.topk.index, full.topk.index)
    np.testing.assert_array_equal(part.topk.score, full.topk.score)
    np.testing.assert_array_equal(part.topk.values, full.topk.values)


def test_a_damaged_checkpoint_is_recomputed(data, tmp_path):
    _X, y, src = data
    run = RunFolder(tmp_path / "run")
    full = run_pass(src, _spec(y), run)
    d = run.pass_dir("screen")
    (d / "done" / "2.json").write_text("{not json")
    (d / "stats" / "t" / "c" / "5").write_bytes(b"")  # what a machine crash can leave
    (d / "stats" / "mean" / "c" / "9").unlink()
    res = run_pass(src, _spec(y), run)
    assert (res.blocks_reused, res.blocks_computed) == (13, 3)
    np.testing.assert_array_equal(res.topk.index, full.topk.index)
    np.testing.assert_array_equal(read_stats(run, "screen")["t"], full_stats_t(src, y))


def full_stats_t(src, y):
    return run_pass(src, _spec(y), scheduler="sync").stats["t"]


def test_other_inputs_start_the_pass_over(data, tmp_path):
    X, y, src = data
    run = RunFolder(tmp_path / "run")
    run_pass(src, _spec(y), run)
    res = run_pass(src, _spec(y, filters=FeatureFilter(drop_missing=0.01)), run)
    assert res.blocks_reused == 0 and res.blocks_computed == 16
    # with missing rate above 1% filtered out (2% missing on average), most features score 0
    miss = _imputed(X)[2]
    stats = read_stats(run, "screen")
    np.testing.assert_array_equal(stats["filtered"] == 1, miss > 0.01)
    assert np.all(stats["score"][miss > 0.01] == 0)


def test_exclude_and_filters_keep_features_off_the_list(data):
    _X, y, src = data
    res = run_pass(src, _spec(y, exclude=np.array([300])), scheduler="sync")
    assert 300 not in res.topk.index
    assert res.stats["score"][300] > 0  # still scored, only kept off the list


def test_sub_block_width_does_not_change_the_list(data):
    _X, y, src = data
    a = run_pass(src, _spec(y, sub_block=64), scheduler="sync")
    b = run_pass(src, _spec(y, sub_block=5), scheduler="sync")
    np.testing.assert_array_equal(a.topk.index, b.topk.index)
    np.testing.assert_array_equal(a.topk.values, b.topk.values)
    np.testing.assert_allclose(a.stats["correlation"], b.stats["correlation"], rtol=1e-13, atol=0)


def test_read_columns_matches_numpy(data):
    X, _y, src = data
    idx = np.array([999, 0, 65, 64, 7, 500])
    rows = np.array([5, 3, 1, 80, 2, *list(range(10, 60))])
    got = read_columns(src, idx, rows=rows, sub_block=16, n_threads=2).values
    xc, _, _ = _imputed(X[rows])
    np.testing.assert_allclose(got, xc[:, idx], atol=1e-12)
    assert got.flags.f_contiguous
    with pytest.raises(IndexError, match=r"0\.\.999"):
        read_columns(src, np.array([1000]))


def test_graph_names_are_deterministic(data):
    _X, y, src = data
    g1, k1, f1 = build_pass(src, _spec(y), [0, 1, 2], None)
    g2, k2, f2 = build_pass(src, _spec(y), [0, 1, 2], None)
    assert k1 == k2 and f1 == f2 and set(g1) == set(g2)
    _g3, k3, _ = build_pass(src, _spec(y, keep=3), [0, 1, 2], None)
    assert k3[0] != k1[0]


def test_topk_merge_is_order_independent(rng):
    # ties broken by index: every merge order equals a full lexsort of all scores (numpy)
    score = np.round(rng.random(400), 2)  # many ties
    parts = [
        block_topk(10, a, score[a : a + 50], None, np.ones(50, bool)) for a in range(0, 400, 50)
    ]
    want = np.lexsort((np.arange(400), -score))[:10]
    for perm in (range(8), reversed(range(8)), rng.permutation(8)):
        got = merge_all([parts[i] for i in perm], 10)
        np.testing.assert_array_equal(got.index, want)
    assert TopK.empty(3).index.size == 0


def test_array_source_pass(rng):
    X = rng.standard_normal((50, 300))
    y = X[:, 4] + rng.standard_normal(50)
    res = run_pass(ArraySource(X, width=70), _spec(y, keep=5), scheduler="sync")
    r = np.array([st.pearsonr(X[:, j], y)[0] for j in range(300)])  # scipy.stats.pearsonr
    np.testing.assert_allclose(res.stats["correlation"], r, atol=1e-12)
    assert res.topk.index[0] == 4


def test_read_stats_refuses_missing_or_unfinished_passes(data, tmp_path):
    _X, y, src = data
    with pytest.raises(RunFolderError, match="no such run folder"):
        read_stats(RunFolder(tmp_path / "nowhere"), "screen")
    run = RunFolder(tmp_path / "run")
    run_pass(src, _spec(y), run)
    with pytest.raises(RunFolderError, match="has no pass 'iter2'"):
        read_stats(run, "iter2")
    (run.pass_dir("screen") / "done" / "4.json").unlink()
    with pytest.raises(RunFolderError, match=r"not finished \(15 of 16 blocks\)"):
        read_stats(run, "screen")
    with pytest.raises(KeyError, match="no statistic 'beta'"):
        run_pass(src, _spec(y), run)
        read_stats(run, "screen", ("beta",))


def test_progress_counts_every_block(data, tmp_path):
    _X, y, src = data
    seen = []
    run = RunFolder(tmp_path / "run")
    run_pass(src, _spec(y), run, progress=lambda d, t: seen.append((d, t)))
    assert seen[0] == (0, 16) and seen[-1] == (16, 16)
    assert [d for d, _ in seen] == sorted(d for d, _ in seen)
    (run.pass_dir("screen") / "done" / "4.json").unlink()
    seen.clear()
    run_pass(src, replace(_spec(y)), run, progress=lambda d, t: seen.append((d, t)))
    assert seen == [(15, 16), (16, 16)]


def test_resume_rebuilds_kept_values_without_reading_blocks(data, tmp_path, monkeypatch):
    X, y, src = data
    rows = np.array([*range(5, 90), 0, 3])  # a joined, reordered subset of the samples
    spec = _spec(y[rows], rows=rows, sub_block=24)
    run = RunFolder(tmp_path / "run")
    full = run_pass(src, spec, run)
    assert (run.pass_dir("screen") / "done" / "0.kept.npz").exists()
    for i in (1, 2):
        (run.pass_dir("screen") / "done" / f"{i}.json").unlink()
    import widescreen.engine._pass as engine_pass

    def no_reads(*args, **kwargs):
        raise AssertionError("the kept columns of reused blocks should not be read again")

    with monkeypatch.context() as m:
        m.setattr(engine_pass, "read_columns", no_reads)
        res = run_pass(src, spec, run)
    assert res.blocks_reused == 14
    assert np.any(~np.isin(res.topk.index // 64, [1, 2]))  # some kept features are in reused blocks
    np.testing.assert_array_equal(res.topk.index, full.topk.index)
    np.testing.assert_array_equal(res.topk.values.view(np.uint64), full.topk.values.view(np.uint64))
    # the kept values are the imputed, centred columns of the analysed rows (numpy)
    xc, _, _ = _imputed(X[rows])
    np.testing.assert_allclose(res.topk.values, xc[:, res.topk.index], atol=1e-12)
    # without the kept columns (an older or damaged run folder) they are read from the store
    for f in (run.pass_dir("screen") / "done").glob("*.kept.npz"):
        f.write_bytes(b"damaged") if f.name.startswith("3.") else f.unlink()
    again = run_pass(src, spec, run)
    np.testing.assert_array_equal(
        again.topk.values.view(np.uint64), full.topk.values.view(np.uint64)
    )
