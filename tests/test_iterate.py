"""The iterative workflow (ISIS) against published results and outside references; resume; splitting."""

from __future__ import annotations

import json
import shutil

import numpy as np
import pytest
import scipy.stats as st
import statsmodels.api as sm
from scipy.special import comb
from typer.testing import CliRunner

from widescreen.cli import app
from widescreen.engine import ArraySource, RunFolder, RunFolderError, read_stats
from widescreen.report import read_tsv
from widescreen.simulate import SimulationConfig, simulate
from widescreen.workflow import (
    IterateConfig,
    intersect_ranked,
    iterate,
    load_problem,
    problem_from_arrays,
    run,
    split_halves,
)
from widescreen.workflow._candidates import StepContext, screen_step

from .conftest import write_outcome, write_store

runner = CliRunner()


def test_isis_finds_the_marginally_hidden_feature_that_sis_misses(tmp_path):
    # Fan & Lv (2008) Section 4.2.2, and Fan, Samworth & Wu (2009): with equicorrelation rho = 0.5 and
    # y = 5 x1 + 5 x2 + 5 x3 - 15 sqrt(rho) x4 + x5 + eps, cov(y, x4) = 0, so SIS keeps x4 in its top
    # d only by chance (about d / p of the time), while ISIS, ranking given the selected set, recovers
    # the whole true set. Published qualitatively; here: ISIS finds x1..x4 in at least 19 of 20
    # replicates, SIS at the same d = floor(n / log n) = 37 finds x4 in at most 3.
    R, isis_ok, sis_x4, isis_x5 = 20, 0, 0, 0
    for r in range(R):
        cfg = SimulationConfig(
            design="hidden", n_samples=200, n_features=1000, chunk_features=250, seed=100 + r
        )
        sim = simulate(tmp_path / f"h{r}.zarr", cfg)
        problem = load_problem(sim.dataset.path, sim.outcome_path, response="y")
        res = iterate(problem, IterateConfig(shortlist="auto", n_lambda=30, max_iter=5))
        x = sim.true_index  # x1..x5 in the design's order
        chosen = set(res.index.tolist())
        isis_ok += set(x[:4].tolist()) <= chosen
        isis_x5 += int(x[4]) in chosen
        sis_x4 += int(x[3]) in res.iterations[0]["candidates"]
        assert res.budget == 37
    assert isis_ok >= 19, (isis_ok, sis_x4, isis_x5)
    assert sis_x4 <= 3, (isis_ok, sis_x4, isis_x5)
    # x5 (corr(y, x5) = 0.159, weak marginally, strong given x1..x4): not a published figure; we
    # observe it recovered in nearly every replicate and only ask for most of them.
    assert isis_x5 >= 14, (isis_ok, sis_x4, isis_x5)


@pytest.fixture
def study(tmp_path, rng):
    """A store with missing values, an outcome with a covariate and a feature hidden marginally."""
    n, p = 160, 500
    z = rng.standard_normal(n)
    X = np.sqrt(0.5) * z[:, None] + np.sqrt(0.5) * rng.standard_normal((n, p))
    X[:, 40] = z
    X = X.astype(np.float32)
    X[rng.random((n, p)) < 0.01] = np.nan
    X[:, 7] = np.nan
    X[:5, 7] = 1.0  # a feature missing almost everywhere: filtered by --drop-missing
    Xf = np.where(np.isnan(X), np.nanmean(X, axis=0), X).astype(np.float64)
    age = rng.uniform(20, 60, n)
    y = 3 * Xf[:, 3] + 3 * Xf[:, 100] - 6 * np.sqrt(0.5) * Xf[:, 40] + 0.05 * age
    y = y + rng.standard_normal(n)
    ds = write_store(tmp_path / "d.zarr", X, chunk_features=64)
    ids = [f"s{i}" for i in range(n)]
    table = write_outcome(
        tmp_path / "o.tsv",
        ids,
        {"y": [repr(float(v)) for v in y], "age": [repr(float(a)) for a in age]},
        rng.permutation(n),
    )
    return ds, table, Xf, y, age


def _cfg(**kw):
    base = dict(response="y", covariates=("age",), shortlist=20, n_lambda=40, drop_missing=0.5)
    return IterateConfig(**{**base, **kw})


def test_conditional_pass_is_the_partial_t_and_scad_refit_is_ols(tmp_path, study):
    ds, table, Xf, y, age = study
    res = run(ds.path, table, _cfg(), tmp_path / "r")
    assert {3, 40, 100} <= set(res.index.tolist())
    man = json.loads((tmp_path / "r" / "manifest.json").read_text())
    first = man["iterations"][0]["model"]["index"]
    stats = read_stats(RunFolder(tmp_path / "r"), "iter1", ("t", "filtered"))
    assert stats["filtered"][7] == 1
    for j in [0, 40, 250, 499]:
        if j in first:
            continue
        # Reference: statsmodels OLS t value of x_j in y ~ 1 + age + X_M + x_j, M = the selected set
        # of the first fit (the conditional utility of FSW 2009 for the linear model).
        design = sm.add_constant(np.column_stack([age, Xf[:, first], Xf[:, j]]))
        assert stats["t"][j] == pytest.approx(sm.OLS(y, design).fit().tvalues[-1], rel=1e-7)
    # SCAD leaves large coefficients unpenalised (Fan & Li 2001): with strong effects the refit equals
    # least squares on the selected set. Reference: statsmodels OLS of y ~ 1 + age + X_selected, on
    # the features as stored with missing values at their mean.
    model = read_tsv(tmp_path / "r" / "model.tsv")
    assert list(model["feature"][:2]) == ["(intercept)", "covariate:age"]
    ols = sm.OLS(y, sm.add_constant(np.column_stack([age, Xf[:, res.index]]))).fit()
    np.testing.assert_allclose(model["coefficient"][:2].astype(float), ols.params[:2], rtol=1e-5)
    by_index = dict(
        zip(model["index"][2:].astype(int), model["coefficient"][2:].astype(float), strict=True)
    )
    np.testing.assert_allclose([by_index[j] for j in res.index], ols.params[2:], rtol=1e-5)
    # Marginal statistics beside each feature: the screen's Pearson t given age (statsmodels OLS).
    j = int(model["index"][2])
    ref = sm.OLS(y, sm.add_constant(np.column_stack([age, Xf[:, j]]))).fit().tvalues[-1]
    assert float(model["t"][2]) == pytest.approx(ref, rel=1e-7)
    assert model["entered"][list(model["index"]).index("40")] != "0"  # the hidden one came later
    its = read_tsv(tmp_path / "r" / "iterations.tsv")
    assert list(its["iteration"]) == [str(i) for i in range(len(its["iteration"]))]
    assert man["stop_reason"] in ("converged", "size budget reached", "no new candidates")


def _tables(run_dir):
    return {f: (run_dir / f).read_text() for f in ("model.tsv", "iterations.tsv", "ranking.tsv")}


def test_rerun_reuses_passes_and_fits_and_gives_identical_tables(tmp_path, study):
    ds, table, *_ = study
    out = tmp_path / "r"
    first = run(ds.path, table, _cfg(), out)
    before = _tables(out)
    m1 = json.loads((out / "manifest.json").read_text())
    again = run(ds.path, table, _cfg(), out)
    # Identical to the byte, timings included: the fits were taken from the manifest, not redone.
    assert _tables(out) == before
    m2 = json.loads((out / "manifest.json").read_text())
    assert m2["iterations"] == m1["iterations"]
    for name in m2["passes"]:
        assert m2["passes"][name]["blocks_computed"] == 0
    np.testing.assert_array_equal(first.coef, again.coef)
    # An interruption inside the second pass: its later blocks and the final tables are gone.
    for f in sorted((out / "passes" / "iter1" / "done").glob("*.json"))[3:]:
        f.unlink()
    for f in ("model.tsv", "iterations.tsv"):
        (out / f).unlink()
    third = run(ds.path, table, _cfg(), out)
    assert _tables(out)["model.tsv"] == before["model.tsv"]
    m3 = json.loads((out / "manifest.json").read_text())
    assert 0 < m3["passes"]["iter1"]["blocks_computed"] < m3["passes"]["iter1"]["blocks_reused"] + 8
    assert [r["model"] for r in m3["iterations"]] == [r["model"] for r in m1["iterations"]]
    np.testing.assert_array_equal(third.coef, first.coef)
    with pytest.raises(RunFolderError, match=r"penalty: 'scad' -> 'mcp'"):
        run(ds.path, table, _cfg(penalty="mcp"), out)


def test_split_keeps_the_intersection_of_the_halves(tmp_path, study):
    ds, table, *_ = study
    res = run(ds.path, table, _cfg(split=True, seed=3), tmp_path / "s")
    a, b = split_halves(res.problem.n, 3)
    assert a.size + b.size == res.problem.n and np.intersect1d(a, b).size == 0
    np.testing.assert_array_equal(split_halves(res.problem.n, 3)[0], a)  # seeded
    rec = res.iterations[0]
    assert rec["passes"] == ["screen_a", "screen_b"]
    tops = [p.topk.index for p in res.screen]
    assert set(rec["candidates"]) <= set(tops[0].tolist())
    assert set(rec["candidates"]) <= set(tops[1].tolist())
    assert set(rec["candidates"]) == set(tops[0].tolist()) & set(tops[1].tolist())
    assert not (tmp_path / "s" / "ranking.tsv").exists()
    assert (tmp_path / "s" / "model.tsv").exists()


def test_split_null_survivors_obey_the_published_bound():
    # Fan, Samworth & Wu (2009): under exchangeability of the noise features,
    # P(at least r noise features in both halves' top k) <= C(k, r)^2 / C(p - s, r). On null data
    # (s = 0) the empirical frequency must stay below the bound within binomial error (99.9% point).
    R, n, p, k = 150, 60, 400, 20
    counts = []
    for r in range(R):
        rng = np.random.default_rng(7000 + r)
        X = rng.standard_normal((n, p))
        y = rng.standard_normal(n)
        problem = problem_from_arrays(ArraySource(X, width=200), y)
        cfg = IterateConfig()
        ctx = StepContext(problem, cfg.rule, cfg.filters, cfg.sub_block, halves=split_halves(n, r))
        c = screen_step(ctx, 0, k, np.empty(0, np.int64), None, None, r)
        tops = [q.topk.index for q in c.passes]
        np.testing.assert_array_equal(np.sort(c.index), np.intersect1d(*tops))
        counts.append(c.index.size)
    counts = np.asarray(counts)
    for r_ in (2, 3, 4):
        bound = comb(k, r_) ** 2 / comb(p, r_)
        assert (counts >= r_).sum() <= st.binom.ppf(0.999, R, min(bound, 1.0)), (r_, bound)


def test_intersect_ranked_orders_by_worse_rank():
    assert intersect_ranked(np.array([5, 1, 9, 3]), np.array([3, 9, 7])).tolist() == [9, 3]


def test_logistic_family_conditions_by_the_score_given_the_model(tmp_path, rng):
    # A GLM family's conditional pass (Fan, Samworth & Wu 2009, in its one-step score form): the
    # current model's linear predictor as an offset, and each candidate adjusted for the selected set.
    n, p = 300, 120
    X = rng.standard_normal((n, p))
    eta = 1.5 * X[:, 2] - 1.5 * X[:, 50]
    y = (rng.random(n) < 1 / (1 + np.exp(-eta))).astype(float)
    ds = write_store(tmp_path / "g.zarr", X.astype(np.float64), chunk_features=40)
    table = write_outcome(tmp_path / "g.tsv", [f"s{i}" for i in range(n)], {"y": y.astype(int)})
    out = tmp_path / "g"
    cfg = IterateConfig(response="y", family="logistic", shortlist=10, n_lambda=30, max_iter=1)
    res = run(ds.path, table, cfg, out)
    assert {2, 50} <= set(res.index.tolist())
    m0 = res.iterations[0]["model"]
    Xc = X - X.mean(axis=0)
    XM = Xc[:, m0["index"]]
    offset = m0["intercept"] + XM @ np.asarray(m0["coef"])
    # Reference null fit: statsmodels GLM Binomial of y ~ 1 with the offset.
    mu = sm.GLM(y, np.ones((n, 1)), sm.families.Binomial(), offset=offset).fit().fittedvalues
    w, r = mu * (1 - mu), y - mu
    C = np.column_stack([np.ones(n), XM])
    A = np.linalg.inv(C.T @ (C * w[:, None]))
    s = read_stats(RunFolder(out), "iter1", ("score_chi2",))
    for j in [0, 77]:
        # Efficient score statistic written out (Rao's score test with nuisance columns C).
        x = Xc[:, j]
        u = x @ r - (x * w) @ C @ A @ (C.T @ r)
        info = x @ (w * x) - (x * w) @ C @ A @ C.T @ (w * x)
        assert s["score_chi2"][j] == pytest.approx(u * u / info, rel=1e-6)


def test_cli_run_writes_the_tables_and_refuses_bad_options(tmp_path, study):
    ds, table, *_ = study
    res = runner.invoke(app, ["run", "--help"])
    assert res.exit_code == 0 and "--threshold" in res.output
    args = ["run", str(ds.path), "--outcome", str(table), "--response", "y", "--covariates", "age"]
    out = tmp_path / "c"
    res = runner.invoke(
        app,
        [
            *args,
            "--out",
            str(out),
            "--shortlist",
            "15",
            "--threshold",
            "bh",
            "--alpha",
            "0.1",
            "-q",
        ],
    )
    assert res.exit_code == 0, res.output
    assert "selected" in res.output and "model.tsv" in res.output
    model = read_tsv(out / "model.tsv")
    assert model["feature"][0] == "(intercept)"
    ranking = read_tsv(out / "ranking.tsv")
    # shortlisted: the first iteration's candidates (top d, kept by the BH threshold)
    man = json.loads((out / "manifest.json").read_text())
    first = set(man["iterations"][0]["candidates"])
    assert [s == "true" for s in ranking["shortlisted"]] == [
        int(i) in first for i in ranking["index"]
    ]
    shutil.rmtree(out)
    res = runner.invoke(app, [*args, "--out", str(out), "--penalty", "ridge", "-q"])
    assert res.exit_code == 1
    assert "penalty" in res.output and "Traceback" not in res.output
    res = runner.invoke(app, [*args, "--out", str(out), "--threshold", "fdr", "-q"])
    assert res.exit_code == 1 and "'threshold' must be one of" in res.output


def test_config_round_trips_and_validates():
    cfg = IterateConfig(response="y", covariates=("age", "sex"), shortlist=12, split=True, seed=4)
    assert IterateConfig.from_dict(cfg.to_dict()) == cfg
    with pytest.raises(ValueError, match="'penalty' must be one of"):
        IterateConfig(penalty="ridge")
    with pytest.raises(ValueError, match="'max_iter' must be a non-negative integer"):
        IterateConfig(max_iter=-1)
