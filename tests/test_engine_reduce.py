"""The engine's one tree reduction and one column reader, against numpy."""

from __future__ import annotations

import numpy as np
import pytest

from widescreen.engine import (
    add_tree,
    as_source,
    read_columns,
    reduce_blocks,
    stream_combine,
    sum_arrays,
    tree_combine,
)
from widescreen.store import MISSING_INT8

from .conftest import write_store


def _spell(parts: list[str]) -> str:
    return "(" + "+".join(parts) + ")"


@pytest.mark.parametrize("n", [1, 2, 7, 8, 9, 63, 64, 65, 130])
def test_the_three_forms_of_the_tree_sum_in_the_same_order(n):
    # The order of a floating-point sum decides its last bits: a graph, an in-memory list and a
    # stream of the same records must build the same expression.
    graph: dict = {}
    leaves = [("leaf", i) for i in range(n)]
    for i in range(n):
        graph[("leaf", i)] = f"x{i}"
    root = add_tree(graph, leaves, _spell, "t")

    def evaluate(key):
        v = graph[key]
        return v[0]([evaluate(k) for k in v[1]]) if isinstance(v, tuple) else v

    names = [f"x{i}" for i in range(n)]
    assert evaluate(root) == tree_combine(names, _spell) == stream_combine(iter(names), _spell)


def _gram_chunk(source, i):
    x = source.read(i).astype(np.float64)
    return x @ x.T


def test_reduce_blocks_resumes_from_group_checkpoints(tmp_path, rng):
    X = rng.normal(size=(12, 300))
    src = as_source(write_store(tmp_path / "x.zarr", X, chunk_features=10))  # 30 blocks
    ref = X @ X.T  # numpy
    plain = reduce_blocks(src, _gram_chunk, name="g", token="t")
    np.testing.assert_allclose(plain, ref, rtol=1e-12)
    folder = tmp_path / "ck"
    first = reduce_blocks(src, _gram_chunk, name="g", token="t", checkpoint=folder)
    np.testing.assert_array_equal(first, plain)  # same tree, same bits
    assert (folder / "result.npy").exists() and not list(folder.glob("[0-9]*.npy"))
    # An interrupted run: groups 0 and 2 of the four (blocks 0-7, 8-15, 16-23, 24-29) saved, no
    # result yet. Planted values show that saved groups are used as they are.
    (folder / "result.npy").unlink()
    planted = {0: np.full((12, 12), 1.0), 2: np.full((12, 12), 2.0)}
    for g, v in planted.items():
        np.save(folder / f"{g}.npy", v)
    calls = []

    def counting(source, i):
        calls.append(i)
        return _gram_chunk(source, i)

    resumed = reduce_blocks(src, counting, name="g", token="t", checkpoint=folder)
    assert sorted(calls) == [*range(8, 16), *range(24, 30)]  # only the groups not saved
    group = [sum_arrays([_gram_chunk(src, i) for i in r]) for r in (range(8, 16), range(24, 30))]
    np.testing.assert_array_equal(resumed, sum_arrays([planted[0], group[0], planted[2], group[1]]))
    # Another token starts over.
    again = reduce_blocks(src, _gram_chunk, name="g", token="other", checkpoint=folder)
    np.testing.assert_array_equal(again, first)


def test_read_columns_in_its_three_forms(tmp_path, rng):
    X = rng.binomial(2, 0.3, size=(40, 100)).astype(np.int8)
    X[rng.random(X.shape) < 0.05] = MISSING_INT8
    src = as_source(write_store(tmp_path / "d.zarr", X, chunk_features=16))
    idx = np.array([99, 3, 50, 3, 17])
    rows = np.array([5, 1, 30, 2, *range(10, 20)])
    raw = read_columns(src, idx, rows=rows, kind="raw")
    assert raw.dtype == np.int8
    np.testing.assert_array_equal(raw, X[rows][:, idx])
    flt = read_columns(src, idx, kind="float")
    want = X[:, idx].astype(float)
    want[X[:, idx] == MISSING_INT8] = np.nan
    np.testing.assert_array_equal(flt, want)
    cols = read_columns(src, idx, rows=rows, kind="prepared", sub_block=8)
    x = X[rows][:, idx].astype(float)
    miss = X[rows][:, idx] == MISSING_INT8
    x[miss] = np.nan
    mean = np.nanmean(x, axis=0)  # mean imputation, then centring (numpy)
    np.testing.assert_allclose(cols.mean, mean, rtol=1e-12)
    np.testing.assert_allclose(cols.values, np.where(miss, 0.0, x - mean), atol=1e-12)
    np.testing.assert_allclose(cols.missing_rate, miss.mean(axis=0))
    with pytest.raises(ValueError, match="kind must be one of"):
        read_columns(src, idx, kind="text")
    assert read_columns(src, np.empty(0, int), kind="raw").shape == (40, 0)
