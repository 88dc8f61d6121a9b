"""The block reader and `prepare_block` against zarr's own reader and plain numpy."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import zarr

from widescreen.store import MISSING_INT8, ChunkError, ChunkLayout, DatasetWriter, _accel
from widescreen.store._reader import prepare_block, read_block

ROUTES = [pytest.param(False, id="numpy")]
if _accel.HAVE_NUMBA:
    ROUTES.insert(0, pytest.param(True, id="numba"))


@pytest.fixture(params=ROUTES)
def route(request, monkeypatch):
    monkeypatch.setattr(_accel, "use_numba", request.param)
    return request.param


def make_store(path, X, chunks, blocks_of=None):
    """Write X in pieces of ``blocks_of`` columns (exercising the writer's buffering)."""
    n, p = X.shape
    kind, dtype = ("dosage", "int8") if X.dtype == np.int8 else ("continuous", X.dtype.name)
    w = DatasetWriter(path, [f"s{i}" for i in range(n)], kind, dtype, n_features=p, chunks=chunks)
    step = blocks_of or p
    for a in range(0, p, step):
        w.append(X[:, a : a + step], [f"f{j}" for j in range(a, min(a + step, p))])
    return w.finalize()


def sample_matrix(rng, dtype: str, n: int, p: int) -> np.ndarray:
    if dtype == "int8":
        X = rng.integers(0, 3, (n, p)).astype(np.int8)
        X[rng.random((n, p)) < 0.05] = MISSING_INT8
    else:
        X = rng.standard_normal((n, p)).astype(dtype)
        X[rng.random((n, p)) < 0.05] = np.nan
    return X


@pytest.mark.parametrize("dtype", ["int8", "float32", "float64"])
@pytest.mark.parametrize(
    ("n", "p", "chunks"),
    [
        (30, 37, (30, 8)),  # odd chunking: the last chunk column holds 5 features
        (50, 21, (16, 8)),  # several sample chunks, the last one partial as well
        (7, 3, (7, 64)),  # one chunk wider than X
    ],
)
def test_read_block_round_trip(tmp_path, rng, dtype, n, p, chunks):
    X = sample_matrix(rng, dtype, n, p)
    ds = make_store(tmp_path / "s", X, chunks, blocks_of=5)
    layout = ChunkLayout.of(ds)
    assert layout.fast
    slow = dataclasses.replace(layout, fast=False)
    n_blocks = -(-p // chunks[1])
    for c in range(n_blocks):
        a, b = c * chunks[1], min((c + 1) * chunks[1], p)
        got = read_block(ds, c, layout).copy()
        # zarr-python's own reader of the same array, and the matrix that was written
        np.testing.assert_array_equal(got, zarr.open_array(tmp_path / "s" / "X", mode="r")[:, a:b])
        np.testing.assert_array_equal(got, X[:, a:b])
        # the zarr fallback route returns the same block
        np.testing.assert_array_equal(read_block(ds, c, slow), got)
    with pytest.raises(IndexError):
        read_block(ds, n_blocks, layout)


def test_damaged_chunks_raise(tmp_path, rng):
    X = sample_matrix(rng, "int8", 20, 16)
    ds = make_store(tmp_path / "s", X, (20, 8))
    chunk = tmp_path / "s" / "X" / "c" / "0" / "1"
    data = chunk.read_bytes()
    chunk.write_bytes(data[: len(data) // 2])
    with pytest.raises(ChunkError, match="truncated"):
        read_block(ds, 1)
    chunk.unlink()
    with pytest.raises(ChunkError, match="missing"):
        read_block(ds, 1)
    np.testing.assert_array_equal(read_block(ds, 0), X[:, :8])


def reference_values(X: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """numpy: observed means, mean-imputed centred float64 values and missing rates."""
    x = X.astype(np.float64)
    miss = (X == MISSING_INT8) if X.dtype == np.int8 else np.isnan(x)
    obs = np.where(miss, 0.0, x)
    n_obs = (~miss).sum(axis=0)
    mean = np.where(n_obs > 0, obs.sum(axis=0) / np.maximum(n_obs, 1), 0.0)
    return mean, np.where(miss, 0.0, x - mean), miss.mean(axis=0)


@pytest.mark.parametrize("dtype", ["int8", "float32", "float64"])
def test_prepare_block_summaries(rng, route, dtype):
    X = sample_matrix(rng, dtype, 45, 19)
    X[:, 4] = 2 if dtype == "int8" else 2.5  # constant
    raw = np.asarray(X)[:, 3:17]  # a strided view, as the engine hands over sub-blocks
    block = prepare_block(raw, start=3)
    mean, values, missing_rate = reference_values(X[:, 3:17])
    assert (block.start, block.stop, block.width, block.n_samples) == (3, 17, 14, 45)
    np.testing.assert_allclose(block.mean, mean, rtol=1e-14)
    np.testing.assert_array_equal(block.missing_rate, missing_rate)
    np.testing.assert_allclose(block.values, values, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(block.sumsq, (values**2).sum(axis=0), rtol=1e-12, atol=1e-12)
    np.testing.assert_array_equal(block.constant, np.arange(3, 17) == 4)
    assert block.values.dtype == np.float64 and block.values.shape == (45, 14)


@pytest.mark.parametrize("dtype", ["int8", "float32"])
def test_prepare_block_rows_cross_and_columns(rng, route, dtype):
    X = sample_matrix(rng, dtype, 40, 12)
    rows = rng.permutation(40)[:31]
    block = prepare_block(X, 0, rows)
    _, values, _ = reference_values(X[rows])
    np.testing.assert_allclose(block.values, values, rtol=1e-12, atol=1e-14)
    # numpy matrix products with the reference values, for 1, 3 and 12 left rows (fused and tiled)
    for m in (1, 3, 12):
        lhs_t = rng.standard_normal((m, 31))
        fresh = prepare_block(X, 0, rows)  # values not yet materialised
        np.testing.assert_allclose(fresh.cross(lhs_t), lhs_t @ values, rtol=1e-11, atol=1e-12)
    idx = np.array([7, 0, 11, 7])
    cols = prepare_block(X, 0, rows).columns(idx)
    np.testing.assert_array_equal(cols, prepare_block(X, 0, rows).values[:, idx])
    with pytest.raises(ValueError, match="samples"):
        block.cross(np.ones((1, 40)))
    with pytest.raises(IndexError):
        prepare_block(X, 0, np.array([0, 40]))


def test_values_buffer_is_reclaimed_safely(rng, route):
    # Two blocks on one thread share the values buffer; the older block must not read the newer one's.
    X1 = sample_matrix(rng, "int8", 30, 10)
    X2 = sample_matrix(rng, "int8", 30, 10)
    a = prepare_block(X1, 0)
    va = a.values.copy()
    b = prepare_block(X2, 10)
    _ = b.values
    lhs_t = rng.standard_normal((1, 30))
    # numpy: the product with the first block's own values
    np.testing.assert_allclose(a.cross(lhs_t), lhs_t @ va, rtol=1e-12, atol=1e-13)
    np.testing.assert_array_equal(a.values, va)


def test_stale_block_copy_is_refused(rng, route):
    # A float sub-block view is copied into a per-thread buffer; a later block takes that buffer over.
    X = sample_matrix(rng, "float32", 20, 16)
    old = prepare_block(X[:, :8], 0)
    prepare_block(X[:, 8:], 8)
    with pytest.raises(RuntimeError, match="overwritten"):
        old.cross(np.ones((1, 20)))
    with pytest.raises(RuntimeError, match="overwritten"):
        old.columns([0])


def test_prepare_block_rejects_bad_input():
    with pytest.raises(ValueError, match="2-dimensional"):
        prepare_block(np.zeros(5), 0)
    with pytest.raises(ValueError, match="numeric"):
        prepare_block(np.array([["a", "b"]]), 0)
    # other integer types are read as float64
    block = prepare_block(np.array([[1, 2], [3, 2], [5, 2]], dtype=np.int32), 0)
    np.testing.assert_array_equal(block.constant, [False, True])
    np.testing.assert_allclose(block.mean, [3.0, 2.0])
