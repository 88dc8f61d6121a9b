"""The pass's running floor: blocks keep only features that can still enter the final top k, and the
final list (with its values) is the same as a full sort of every feature's score."""

from __future__ import annotations

import json

import numpy as np

from widescreen.engine import RunFolder
from widescreen.workflow import Problem, screen_problem

from .conftest import write_store


def test_floor_keeps_the_exact_top_k(tmp_path):
    rng = np.random.default_rng(5)
    n, p, k = 60, 1000, 20
    X = rng.integers(0, 3, size=(n, p)).astype(np.int8)
    X[rng.random((n, p)) < 0.02] = -128
    X[:, 900:910] = X[:, 100:110]  # exact ties: the lower index must win
    ds = write_store(tmp_path / "d.zarr", X, chunk_features=50)  # 20 blocks
    y = rng.normal(size=n)
    problem = Problem.from_arrays(ds.path, y)
    run = RunFolder(tmp_path / "r")
    got = screen_problem(problem, shortlist=k, sub_block=16, run=run, scheduler="threads:2")
    mem = screen_problem(problem, shortlist=k, sub_block=16, scheduler="sync")
    # Reference: every feature's score sorted, ties by index (numpy lexsort).
    score = mem.statistics["score"]
    ref = np.lexsort((np.arange(p), -score))[:k]
    np.testing.assert_array_equal(got.index, ref)
    np.testing.assert_array_equal(mem.index, ref)
    np.testing.assert_array_equal(got.values, mem.values)
    # Reference values: the mean-imputed, centred columns (numpy).
    x = np.where(X[:, ref] == -128, np.nan, X[:, ref]).astype(float)
    x = np.where(np.isnan(x), 0.0, x - np.nanmean(x, axis=0))
    np.testing.assert_allclose(mem.values, x, atol=1e-12)
    # The blocks' lists got shorter than k once the floor rose.
    done = run.layout.pass_("screen").done
    kept = [len(json.loads((done / f"{b}.json").read_text())["index"]) for b in range(20)]
    assert sum(kept) < 20 * k / 2, kept
