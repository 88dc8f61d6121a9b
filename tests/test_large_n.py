"""Large n on small data: stores chunked over samples, the capped shortlist, the refit's memory check.

References: each family's statistics on a store whose X is split into sample chunks are compared with
the same data in one sample chunk (the family kit's store, whose kernels are checked against scipy and
statsmodels in their own tests); the shortlist size against floor(n / log n) (Fan & Lv 2008) and the
cap's arithmetic written out.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

import widescreen.workflow._candidates as candidates_mod
import widescreen.workflow._problem as problem_mod
from widescreen.engine import MemoryBudgetError, read_columns
from widescreen.store import DatasetWriter, open_dataset, read_block
from widescreen.workflow import (
    IterateConfig,
    Problem,
    ScreenConfig,
    iterate,
    screen,
    screen_problem,
)
from widescreen.workflow._problem import MAX_AUTO_SHORTLIST, shortlist_notice, shortlist_size

from .family_kit import Case


def _sample_chunked(path, X, ids, rows):
    w = DatasetWriter(path, ids, "continuous", "float64", max_samples_per_chunk=rows)
    w.append(X, [f"f{j}" for j in range(X.shape[1])])
    return w.finalize()


def test_writer_chunks_over_samples_at_the_given_threshold(tmp_path, rng):
    x = rng.integers(0, 3, (300, 500), dtype=np.int8)
    x[rng.random(x.shape) < 0.02] = -128
    w = DatasetWriter(
        tmp_path / "s.zarr", [f"s{i}" for i in range(300)], "dosage", "int8",
        n_features=500, max_samples_per_chunk=64,
    )  # fmt: skip
    w.append(x, [f"f{j}" for j in range(500)])
    ds = w.finalize()
    assert ds.chunks[0] == 64
    assert ds.checksum_table().shape[0] == 5  # ceil(300 / 64) sample chunks, each checksummed
    assert ds.fingerprint()
    width = ds.chunks[1]
    for c in range(-(-500 // width)):
        np.testing.assert_array_equal(read_block(ds, c), x[:, c * width : (c + 1) * width])


def test_every_family_combines_sample_chunks(family_case: Case, tmp_path):
    """A store in 16-sample chunks (the last one partial) gives the one-chunk store's statistics."""
    chunked = _sample_chunked(
        tmp_path / "c.zarr", family_case.X, list(family_case.sample_ids), rows=16
    )
    assert chunked.chunks[0] == 16 and open_dataset(family_case.store).chunks[0] == 60
    order = np.random.default_rng(2).permutation(family_case.X.shape[0])
    stats = []
    for store in (family_case.store, chunked.path):
        problem = Problem.from_arrays(
            store,
            family_case.y[order],
            family=family_case.family,
            event=None if family_case.event is None else family_case.event[order],
            covariates=family_case.age[order],
            sample_ids=family_case.sample_ids[order],
        )
        stats.append(screen_problem(problem, shortlist=10).statistics)
    assert set(stats[0]) == set(stats[1])
    for c in stats[0]:
        np.testing.assert_allclose(stats[1][c], stats[0][c], rtol=1e-10, atol=1e-12, err_msg=c)


def test_refit_columns_and_run_on_sample_chunks(tmp_path, rng, monkeypatch):
    n, p = 130, 200
    X = rng.standard_normal((n, p))
    y = 2 * X[:, 5] - 2 * X[:, 77] + rng.standard_normal(n)
    ids = [f"s{i}" for i in range(n)]
    one = _sample_chunked(tmp_path / "one.zarr", X, ids, rows=n)
    many = _sample_chunked(tmp_path / "many.zarr", X, ids, rows=32)
    rows = np.arange(3, n - 2)
    index = np.array([199, 5, 77, 64])
    from widescreen.engine import as_source

    a = read_columns(as_source(one), index, rows=rows, kind="float")
    b = read_columns(as_source(many), index, rows=rows, kind="float")
    np.testing.assert_array_equal(a, b)
    cfg = IterateConfig(response="y", shortlist=8, max_iter=2, n_lambda=20)
    fits = [iterate(Problem.from_arrays(s.path, y), cfg) for s in (one, many)]
    np.testing.assert_array_equal(fits[0].index, fits[1].index)
    np.testing.assert_allclose(fits[0].coef, fits[1].coef, rtol=1e-9)
    # Large n x d: the pass keeps indices only and the candidates' columns are read afterwards;
    # the same values, so the same model to the bit.
    monkeypatch.setattr(candidates_mod, "KEEP_VALUES_BYTES", 0)
    read = iterate(Problem.from_arrays(many.path, y), cfg)
    np.testing.assert_array_equal(read.index, fits[1].index)
    np.testing.assert_array_equal(read.coef, fits[1].coef)


def test_shortlist_cap():
    # floor(n / log n) (Fan & Lv 2008) below the cap: unchanged.
    assert shortlist_size("auto", 2000) == math.floor(2000 / math.log(2000)) == 263
    assert shortlist_notice("auto", 2000, "2GiB") is None
    # Above the fixed maximum without a budget.
    assert math.floor(30000 / math.log(30000)) > MAX_AUTO_SHORTLIST
    assert shortlist_size("auto", 30000) == MAX_AUTO_SHORTLIST
    # With a budget of 2 GiB at n = 50,000: half of it for the refit's 8 copies of 8 n d bytes.
    d = 2**31 // (2 * 8 * 50000 * 8)
    assert d == 335
    assert shortlist_size("auto", 50000, None, "2GiB") == d
    rec = shortlist_notice("auto", 50000, "2GiB")
    assert rec["auto"] == math.floor(50000 / math.log(50000)) and rec["size"] == d
    assert "memory budget" in rec["notice"] and "\n" not in rec["notice"]
    # An explicit size is the user's: never capped.
    assert shortlist_size(3000, 50000, None, "2GiB") == 3000


def test_capped_shortlist_recorded_and_noticed(tmp_path, monkeypatch, rng):
    from typer.testing import CliRunner

    from widescreen.cli import app

    from .conftest import write_outcome, write_store

    n, p = 80, 120
    x = rng.integers(0, 3, (n, p), dtype=np.int8)
    ids = [f"s{i}" for i in range(n)]
    write_store(tmp_path / "s.zarr", x, sample_ids=ids)
    write_outcome(tmp_path / "y.tsv", ids, {"y": x[:, 3] + rng.standard_normal(n)})
    monkeypatch.setattr(problem_mod, "MAX_AUTO_SHORTLIST", 7)
    res = CliRunner().invoke(
        app,
        ["screen", str(tmp_path / "s.zarr"), "--outcome", str(tmp_path / "y.tsv"),
         "--response", "y", "--out", str(tmp_path / "run"), "-q", "--no-report"],
    )  # fmt: skip
    assert res.exit_code == 0, res.output
    assert "note: shortlist capped at 7 features (floor(n / log n) = 18 at n = 80)" in res.output
    manifest = json.loads((tmp_path / "run/manifest.json").read_text())
    assert manifest["shortlist_size"] == 7
    assert manifest["shortlist_cap"]["auto"] == 18 and manifest["shortlist_cap"]["size"] == 7
    # Without the cap applying, no record.
    monkeypatch.setattr(problem_mod, "MAX_AUTO_SHORTLIST", 2000)
    screen(tmp_path / "s.zarr", tmp_path / "y.tsv", ScreenConfig(response="y"), tmp_path / "r2")
    assert "shortlist_cap" not in json.loads((tmp_path / "r2/manifest.json").read_text())


def test_refit_refused_when_its_values_exceed_the_budget(rng):
    from widescreen.workflow._refit import check_refit_memory

    check_refit_memory(2000, 300, "2GiB")  # 38 MB of values: fits
    check_refit_memory(10**6, 10**4, None)  # no budget, no check
    with pytest.raises(MemoryBudgetError, match=r"refit of 4000 features on 50000 samples needs"):
        check_refit_memory(50000, 4000, "2GiB")
