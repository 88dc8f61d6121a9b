"""Several traits in one run folder (``--response a,b,c``): each trait's tables equal a one-trait run.

The reference is the same command run with one trait (itself checked against scipy and statsmodels in
test_workflow_screen.py and test_iterate.py); a trait's missing values drop its samples there, as they
leave its column of the shared pass here.
"""

from __future__ import annotations

import json
import subprocess
import time

import numpy as np
import pytest

from widescreen.schema import read_table
from widescreen.workflow import IterateConfig, ScreenConfig, run, screen

from .conftest import write_outcome, write_store

TRAITS = ("a", "b", "c")


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("traits")
    rng = np.random.default_rng(3)
    n, p = 90, 230
    X = rng.integers(0, 3, size=(n, p)).astype(np.int8)
    X[rng.random((n, p)) < 0.03] = -128
    ds = write_store(tmp / "d.zarr", X, chunk_features=64)
    Xf = np.where(X == -128, 1.0, X)
    age = rng.uniform(20, 60, n)
    cols = {"age": [repr(float(v)) for v in age]}
    for t, (j, b) in zip(TRAITS, [(3, 1.0), (100, -0.9), (200, 0.8)], strict=True):
        y = b * Xf[:, j] + 0.02 * age + rng.normal(size=n)
        txt = [repr(float(v)) for v in y]
        for i in rng.choice(n, 8, replace=False):
            txt[i] = "NA"  # each trait misses its own samples
        cols[t] = txt
    cols["c"][0] = cols["a"][0] = cols["b"][0] = "NA"  # a sample with no trait is not analysed
    ids = [f"s{i}" for i in range(n)]
    return ds, write_outcome(tmp / "o.tsv", ids, cols), tmp


def _same_table(a, b, skip=()):
    ta, tb = read_table(a), read_table(b)
    assert list(ta.columns) == list(tb.columns)
    for c in ta.columns:
        if c in skip:
            continue
        if ta[c].dtype.kind == "f":
            np.testing.assert_allclose(ta[c].to_numpy(), tb[c].to_numpy(), rtol=1e-8, err_msg=c)
        else:
            assert ta[c].tolist() == tb[c].tolist(), c


def test_screen_traits_equal_one_trait_screens(study, tmp_path):
    ds, table, _ = study
    conf = ScreenConfig(response="a, b,c", covariates=("age",), shortlist=6, drop_missing=0.05)
    out = tmp_path / "all"
    res = screen(ds.path, table, conf, out)
    assert res.names == TRAITS
    summary = read_table(out / "traits.tsv")
    assert summary["trait"].tolist() == list(TRAITS)
    assert summary["selected_size"].isna().all()
    for t in TRAITS:
        one = tmp_path / f"one-{t}"
        single = screen(
            ds.path, table, ScreenConfig(response=t, covariates=("age",), shortlist=6,
                                         drop_missing=0.05), one,
        )  # fmt: skip
        _same_table(out / "traits" / t / "ranking.tsv", one / "ranking.tsv")
        row = summary[summary["trait"] == t].iloc[0]
        assert row["n"] == single.problem.n
        assert row["top_feature"] == str(single.feature_ids[0])
        assert row["lambda_gc"] == pytest.approx(single.lambda_gc, rel=1e-6)
        m = json.loads((out / "traits" / t / "manifest.json").read_text())
        assert m["status"] == "complete" and m["samples"] == single.problem.samples
    # One pass over the store for all traits: the trait folders hold no statistics of their own.
    assert not (out / "traits" / "a" / "passes" / "screen" / "stats").exists()
    # Interrupted mid-pass (two blocks without their markers, one trait's table not yet written), a
    # rerun computes only what is missing and gives the same bytes.
    files = [out / "traits.tsv", *(out / "traits" / t / "ranking.tsv" for t in TRAITS)]
    before = [f.read_bytes() for f in files]
    for b in (1, 2):
        (out / "passes" / "screen" / "done" / f"{b}.json").unlink()
    (out / "traits" / "b" / "ranking.tsv").unlink()
    again = screen(ds.path, table, conf, out)
    assert (again.pass_result.blocks_reused, again.pass_result.blocks_computed) == (2, 2)
    assert [f.read_bytes() for f in files] == before


def test_run_traits_equal_one_trait_runs(study, tmp_path):
    ds, table, _ = study
    kw = {"covariates": ("age",), "shortlist": 8, "max_iter": 2, "penalty": "lasso"}
    out = tmp_path / "all"
    res = run(ds.path, table, IterateConfig(response="a,b,c", **kw), out)
    summary = read_table(out / "traits.tsv")
    for k, t in enumerate(TRAITS):
        one = tmp_path / f"one-{t}"
        single = run(ds.path, table, IterateConfig(response=t, **kw), one)
        np.testing.assert_array_equal(res.results[k].index, single.index)
        np.testing.assert_allclose(res.results[k].coef, single.coef, rtol=1e-7, atol=1e-10)
        for f in ("model.tsv", "ranking.tsv", "entries.tsv"):
            _same_table(out / "traits" / t / f, one / f)
        _same_table(
            out / "traits" / t / "iterations.tsv",
            one / "iterations.tsv",
            skip=("pass_seconds", "fit_seconds"),
        )
        assert summary["selected_size"].tolist()[k] == single.index.size


@pytest.mark.slow
def test_killed_mid_pass_resumes_bit_identical(tmp_path):
    """SIGKILL in the shared pass, then in one trait's conditional pass; the resumed run's tables and
    statistics files equal an uninterrupted run's byte for byte (timing columns aside)."""
    from .test_faults import CLI, _table_without_timing

    rng = np.random.default_rng(11)
    n, p = 80, 800
    X = rng.integers(0, 3, size=(n, p)).astype(np.int8)
    ds = write_store(tmp_path / "d.zarr", X, chunk_features=16)  # 50 blocks
    cols = {}
    for t, j in zip(TRAITS, (5, 300, 700), strict=True):
        y = X[:, j] + X[:, j + 1] + rng.normal(size=n)
        cols[t] = [repr(float(v)) if i % 17 else "NA" for i, v in enumerate(y)]
    table = write_outcome(tmp_path / "o.tsv", [f"s{i}" for i in range(n)], cols)
    args = ["run", str(ds.path), "--outcome", str(table), "--response", "a,b,c"]
    args += ["--shortlist", "10", "--penalty", "lasso", "--max-iter", "1", "-q", "--no-report"]
    ref = tmp_path / "ref"
    run(ds.path, table, IterateConfig(response="a,b,c", shortlist=10, penalty="lasso",
                                      max_iter=1), ref)  # fmt: skip
    out = tmp_path / "out"
    for done in (
        out / "passes" / "screen" / "done",
        out / "traits" / "b" / "passes" / "iter1" / "done",
    ):
        proc = subprocess.Popen([*CLI, *args, "--out", str(out)], stderr=subprocess.PIPE)
        t0 = time.monotonic()
        while proc.poll() is None and len(list(done.glob("*.json"))) < 20:
            assert time.monotonic() - t0 < 120, "no progress"
            time.sleep(0.002)
        proc.kill()
        proc.communicate()
        assert 0 < len(list(done.glob("*.json"))) < 50  # killed mid-pass
    run(ds.path, table, IterateConfig(response="a,b,c", shortlist=10, penalty="lasso",
                                      max_iter=1), out)  # fmt: skip
    files = sorted(f.relative_to(ref) for f in ref.rglob("*.tsv"))
    assert [f.relative_to(out) for f in sorted(out.rglob("*.tsv"))] == files
    for f in files:
        assert _table_without_timing(out / f) == _table_without_timing(ref / f), f
    stats = sorted(f.relative_to(ref) for f in ref.rglob("stats/*/c/**/*") if f.is_file())
    assert stats and all((out / f).read_bytes() == (ref / f).read_bytes() for f in stats)


def test_refusals(study, tmp_path):
    ds, table, _ = study
    with pytest.raises(ValueError, match="distinct columns separated by commas"):
        ScreenConfig(response="a,a")
    with pytest.raises(ValueError, match="cannot name a folder"):
        ScreenConfig(response="a,.b")
    with pytest.raises(ValueError, match="cox family screens one response at a time"):
        screen(ds.path, table, ScreenConfig(response="a,b", family="cox", event="c"), tmp_path)


def test_star_names_every_numeric_column_but_covariates_and_event(study, tmp_path):
    from typer.testing import CliRunner

    from widescreen.cli import app
    from widescreen.workflow._problem import expand_response

    ds, table, _ = study
    # a text column and the event are not responses; "NA" cells do not make a column non-numeric
    extra = tmp_path / "o.tsv"
    lines = table.read_text().splitlines()
    extra.write_text(
        "\n".join(
            [lines[0] + "\tsite\tdead"]
            + [f"{line}\tplate{i % 3}\t{i % 2}" for i, line in enumerate(lines[1:])]
        )
        + "\n"
    )
    assert expand_response("*", extra, ("age",), "dead") == "a,b,c"
    assert expand_response("*", extra, ("age",)) == "a,b,c,dead"
    assert expand_response("a", extra) == "a"
    out = tmp_path / "run"
    args = ["screen", str(ds.path), "--outcome", str(table), "--response", "*"]
    args += ["--covariates", "age", "--shortlist", "6", "--out", str(out), "-q", "--no-report"]
    res = CliRunner().invoke(app, args)
    assert res.exit_code == 0, res.output
    assert read_table(out / "traits.tsv")["trait"].tolist() == list(TRAITS)
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["config"]["response"] == "a,b,c"
