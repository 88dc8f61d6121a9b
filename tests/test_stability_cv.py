"""Stability selection (`run --stability B`) and cross-validation of the pipeline (`run --cv-folds K`):
subsets from the seed, the published error bounds, held-out metrics against scikit-learn, accuracy
at chance without signal and high with it, and resume after a kill."""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from scipy.special import comb
from sklearn.metrics import log_loss, mean_poisson_deviance, r2_score, roc_auc_score

from widescreen.engine import FeatureFilter
from widescreen.report import build_report
from widescreen.schema import CV, STABILITY, read_table
from widescreen.simulate import SimulationConfig, simulate
from widescreen.workflow import (
    IterateConfig,
    Problem,
    binomial_deviance,
    complementary_pairs,
    concordance_index,
    cross_validate,
    cv_folds,
    mb_bound,
    poisson_deviance,
    roc_auc,
    run,
    ss_unimodal_bound,
    stability_selection,
)
from widescreen.workflow import r2_score as ws_r2
from widescreen.workflow._refit import FitSettings
from widescreen.workflow._subsets import SubsetScreen, screen_responses
from widescreen.workflow._tables import cv_text

CLI = [sys.executable, "-c", "from widescreen.cli import main; main()"]
FIT = FitSettings(n_lambda=30)


# ------------------------------------------------------------------------------------------------
# subsets from the seed


def test_complementary_pairs_are_stratified_disjoint_halves_drawn_from_the_seed():
    rng = np.random.default_rng(0)
    y = (rng.random(101) < 0.3).astype(np.int64)
    pairs = complementary_pairs(101, 6, seed=7, strata=y)
    for a, b in pairs:
        assert a.size + b.size == 101 and abs(a.size - b.size) <= 1
        assert np.intersect1d(a, b).size == 0
        assert np.array_equal(np.union1d(a, b), np.arange(101))
        # each half holds half of the cases, to one
        assert abs(int(y[a].sum()) - int(y[b].sum())) <= 1
    again = complementary_pairs(101, 8, seed=7, strata=y)  # pair b does not depend on B
    for (a, b), (c, d) in zip(pairs, again[:6], strict=True):
        assert np.array_equal(a, c) and np.array_equal(b, d)
    other = complementary_pairs(101, 6, seed=8, strata=y)
    assert not np.array_equal(other[0][0], pairs[0][0])
    assert not np.array_equal(pairs[0][0], pairs[1][0])


def test_cv_folds_partition_the_samples_stratified_from_the_seed():
    event = np.r_[np.ones(23), np.zeros(77)].astype(np.int64)
    f = cv_folds(100, 5, seed=3, strata=event)
    assert np.array_equal(f, cv_folds(100, 5, seed=3, strata=event))
    assert not np.array_equal(f, cv_folds(100, 5, seed=4, strata=event))
    assert np.bincount(f).tolist() == [20] * 5
    ev = np.bincount(f, weights=event)
    assert ev.max() - ev.min() <= 1
    with pytest.raises(ValueError, match="only 3 samples with outcome 1"):
        cv_folds(100, 5, seed=3, strata=np.r_[np.ones(3), np.zeros(97)].astype(np.int64))


# ------------------------------------------------------------------------------------------------
# the error bounds


def test_the_bounds_follow_the_published_formulas():
    # Meinshausen & Buhlmann (2010, JRSS-B 72:417), Theorem 1: E[V] <= q^2 / ((2 pi_thr - 1) p).
    assert mb_bound(10, 1000, 0.6) == pytest.approx(100 / (0.2 * 1000))
    assert mb_bound(5, 500, 0.9) == pytest.approx(25 / (0.8 * 500))
    # Shah & Samworth (2013, JRSS-B 75:55), eq. 8, under unimodality (the constants from memory):
    # C(tau, B) = 1 / (2 (2 tau - 1 - 1 / (2B))) for tau <= 3/4, 4 (1 - tau + 1/(2B)) / (1 + 1/B)
    # above; the bound is C theta q with theta = q / p.
    q, p, B = 10.0, 1000, 50
    assert ss_unimodal_bound(q, p, 0.6, B) == pytest.approx(
        1 / (2 * (1.2 - 1 - 1 / 100)) * q * q / p
    )
    assert ss_unimodal_bound(q, p, 0.9, B) == pytest.approx(
        4 * (1 - 0.9 + 1 / 100) / (1 + 1 / 50) * q * q / p
    )
    # below the range it covers (tau <= min(1/2 + theta, 1/2 + 1/(2B) + 3 theta / 4)): no bound
    assert ss_unimodal_bound(q, p, 0.505, B) is None
    # the improved bound is smaller than Meinshausen & Buhlmann's wherever it applies
    for tau in (0.55, 0.6, 0.7, 0.75, 0.8, 0.9, 1.0):
        assert ss_unimodal_bound(q, p, tau, B) < mb_bound(q, p, tau)


def test_the_bound_holds_for_a_selector_that_picks_at_random():
    # A selector choosing q of p features at random on each half: every feature is noise, and the
    # expected number in the stable set, p P(frequency >= tau), must stay below q^2 / ((2 tau - 1) p)
    # (Meinshausen & Buhlmann 2010, Theorem 1; exchangeable and no better than random). Here the
    # exact P(frequency >= tau) of a Binomial(2B, q / p) frequency, computed with scipy.special.comb.
    q, p, B = 20, 200, 25
    pi = q / p
    for tau in (0.6, 0.7, 0.9):
        k = np.arange(int(np.ceil(tau * 2 * B)), 2 * B + 1)
        tail = float(np.sum(comb(2 * B, k) * pi**k * (1 - pi) ** (2 * B - k)))
        assert p * tail <= mb_bound(q, p, tau)


# ------------------------------------------------------------------------------------------------
# held-out metrics against outside references


def test_held_out_metrics_agree_with_scikit_learn():
    rng = np.random.default_rng(5)
    y01 = (rng.random(300) < 0.4).astype(float)
    eta = np.round(rng.standard_normal(300) + y01, 1)  # rounded: ties between the classes
    # sklearn.metrics.roc_auc_score (ties count one half there too)
    assert roc_auc(y01, eta) == pytest.approx(roc_auc_score(y01, eta), rel=1e-12)
    # binomial deviance = 2 x the mean log loss (sklearn.metrics.log_loss)
    p = 1 / (1 + np.exp(-eta))
    assert binomial_deviance(y01, eta) == pytest.approx(2 * log_loss(y01, p), rel=1e-10)
    counts = rng.poisson(np.exp(0.3 * eta)).astype(float)
    assert poisson_deviance(counts, 0.3 * eta) == pytest.approx(
        mean_poisson_deviance(counts, np.exp(0.3 * eta)), rel=1e-10
    )
    yq = rng.standard_normal(300)
    pred = yq + rng.standard_normal(300)
    assert ws_r2(yq, pred) == pytest.approx(r2_score(yq, pred), rel=1e-12)
    # Harrell's C by its definition over all pairs (Harrell et al. 1982, JAMA 247:2543)
    t = rng.exponential(size=60).round(1)
    e = rng.random(60) < 0.7
    r = rng.standard_normal(60).round(1)
    num = den = 0.0
    for i in range(60):
        for j in range(60):
            if e[i] and t[i] < t[j]:
                den += 1
                num += 1.0 if r[i] > r[j] else 0.5 if r[i] == r[j] else 0.0
    assert concordance_index(t, e, r) == pytest.approx(num / den, rel=1e-12)


# ------------------------------------------------------------------------------------------------
# the pipeline on data


def _problem(family: str, signal: float, seed: int, n: int = 200, p: int = 500) -> Problem:
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, p))
    eta = signal * (X[:, 3] - X[:, 10] + X[:, 42])
    if family == "linear":
        y = eta + rng.standard_normal(n)
    elif family == "cox":
        y = rng.exponential(np.exp(-eta))
        return Problem.from_arrays(X, y, family=family, event=rng.random(n) < 0.8)
    else:
        y = (rng.random(n) < 1 / (1 + np.exp(-eta))).astype(float)
    return Problem.from_arrays(X, y, family=family)


def _stability(problem, seed=0, n_pairs=8):
    return stability_selection(
        SubsetScreen(problem, FeatureFilter()),
        n_pairs=n_pairs,
        threshold=0.6,
        shortlist="auto",
        settings=FIT,
        seed=seed,
        n_candidates=problem.n_features,
    )


def test_selection_frequencies_are_reproducible_and_single_out_the_signal():
    problem = _problem("linear", 1.0, seed=1)
    a = _stability(problem, seed=0)
    b = _stability(problem, seed=0)
    assert np.array_equal(a.index, b.index) and np.array_equal(a.frequency, b.frequency)
    assert {3, 10, 42} <= set(a.stable.tolist())
    assert (a.frequency_of(np.array([3, 10, 42])) >= 0.9).all()
    never = np.setdiff1d(np.arange(500), a.index)[:3]
    assert a.frequency_of(never).tolist() == [0.0] * never.size and never.size
    # the stable set holds few noise features; the bound is computed from the halves' mean size
    assert len(set(a.stable.tolist()) - {3, 10, 42}) <= 2
    assert a.q == pytest.approx(np.mean(a.selected_sizes))
    assert a.bound_mb == pytest.approx(a.q**2 / (0.2 * 500))
    assert len(a.selected_sizes) == 16
    c = _stability(problem, seed=1)  # other halves: other frequencies for the noise features
    assert {3, 10, 42} <= set(c.stable.tolist())
    assert not (np.array_equal(a.index, c.index) and np.array_equal(a.frequency, c.frequency))


@pytest.mark.parametrize("family", ["linear", "logistic", "cox"])
def test_one_pass_for_all_halves_gives_the_shortlists_of_one_pass_per_half(monkeypatch, family):
    # The response-matrix pass (all halves at once) against the single-response pass of each half:
    # the same order for the linear family; the logistic and Cox matrix passes rank by the score test,
    # the single pass by the likelihood-ratio test of the ML fit, so the lists agree but for near ties.
    problem = _problem(family, 1.0, seed=6)
    rng = np.random.default_rng(0)
    Y = np.where(rng.random((problem.n, 6)) < 0.5, problem.response.y[:, None], np.nan)
    where = SubsetScreen(problem, FeatureFilter())
    names = [f"h{k}" for k in range(6)]
    matrix = list(screen_responses(where, Y, shortlist=20, names=names))
    assert len(matrix) == 1 and matrix[0][0] == list(range(6))  # one pass for the six
    monkeypatch.setattr(type(problem.family), "multi_kernel", None)
    single = list(screen_responses(where, Y, shortlist=20, names=names))
    assert [cols for cols, _ in single] == [[k] for k in range(6)]
    for k, (_, lists) in enumerate(single):
        if family == "linear":
            np.testing.assert_array_equal(matrix[0][1][k], lists[0])
        else:
            assert np.intersect1d(matrix[0][1][k], lists[0]).size >= 18


def test_subsets_the_family_cannot_fit_are_skipped_and_named():
    # A covariate set on 3 samples (2 cases, 1 control): a half or training set holding only cases
    # among them (or none of them) cannot be fitted; it is skipped, and the frequencies are shares
    # of the other halves.
    rng = np.random.default_rng(8)
    X = rng.standard_normal((120, 60))
    y = (rng.random(120) < 1 / (1 + np.exp(-2 * X[:, 5]))).astype(float)
    z = np.zeros(120)
    rare = np.r_[np.flatnonzero(y == 1)[:2], np.flatnonzero(y == 0)[:1]]
    z[rare] = 1.0
    problem = Problem.from_arrays(X, y, family="logistic", covariates=z[:, None])
    stab = _stability(problem, n_pairs=6)
    assert 0 < len(stab.skipped) < 12 and len(stab.selected_sizes) == 12 - len(stab.skipped)
    assert all(s.startswith("half-sample 00") for s in stab.skipped)
    assert stab.frequency_of(np.array([5]))[0] >= 0.5
    cv = _cv(problem, folds=3)
    rows = {f["fold"]: f for f in cv.folds}
    for s in cv.skipped:
        k = int(s.split()[1].rstrip(":"))
        assert rows[k]["selected"] is None and np.isnan(rows[k]["auc"])
    assert len(cv.skipped) == 1 and np.isfinite(cv.summary()["auc"]["mean"])
    assert "\tNA\tNA\t" in cv_text(cv)  # selected and r2 of the skipped fold


def _cv(problem, folds=5, seed=0, settings=FIT):
    return cross_validate(
        SubsetScreen(problem, FeatureFilter()),
        n_folds=folds,
        shortlist="auto",
        settings=settings,
        seed=seed,
        n_candidates=problem.n_features,
    )


def test_cross_validated_accuracy_is_at_chance_without_signal_and_high_with_it():
    # Screening inside each fold: with no signal the held-out R^2 is about 0 or below and the AUC
    # about 0.5 or below (Ambroise & McLachlan 2002, PNAS 99:6562: only then is the estimate not
    # optimistic). A lasso tuned by BIC keeps noise features, so the folds' models are not empty;
    # features chosen for their training-fold association tend to the opposite sign in the held-out
    # fold (their association over all samples is near 0), so chance here reads at or below 0.5.
    noisy = FitSettings(penalty="lasso", criterion="bic", n_lambda=30)
    none_lin = _cv(_problem("linear", 0.0, seed=2), settings=noisy)
    assert sum(f["selected"] for f in none_lin.folds) >= 10
    assert none_lin.summary()["r2"]["mean"] <= 0.03
    none_log = _cv(_problem("logistic", 0.0, seed=3), settings=noisy)
    assert sum(f["selected"] for f in none_log.folds) >= 10
    assert none_log.summary()["auc"]["mean"] <= 0.6
    # The run's default refit (SCAD tuned by EBIC) keeps nothing here: exactly the coin.
    assert _cv(_problem("logistic", 0.0, seed=3)).summary()["auc"]["mean"] == 0.5
    strong_lin = _cv(_problem("linear", 1.0, seed=2))
    assert strong_lin.summary()["r2"]["mean"] >= 0.65
    assert [f["n_test"] for f in strong_lin.folds] == [40] * 5
    assert all(f["selected"] >= 3 for f in strong_lin.folds)
    strong_log = _cv(_problem("logistic", 2.0, seed=3)).summary()
    assert strong_log["auc"]["mean"] >= 0.85
    assert strong_log["deviance"]["mean"] < 2 * np.log(2)  # better than the coin (common practice)
    again = _cv(_problem("linear", 1.0, seed=2))
    assert again.folds == strong_lin.folds  # folds and fits from the seed


# ------------------------------------------------------------------------------------------------
# the run folder, the command line and resume


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    root = tmp_path_factory.mktemp("trust")
    cfg = SimulationConfig(
        design="independent", n_samples=160, n_features=400, n_true=4, chunk_features=8, seed=4
    )
    sim = simulate(root / "x.zarr", cfg)
    ref = root / "ref"
    config = IterateConfig(
        response="y", n_lambda=20, max_iter=1, stability=6, stability_threshold=0.7, cv_folds=4
    )
    run(sim.dataset.path, sim.outcome_path, config, ref)
    return root, sim, ref


def _args(sim, out: Path) -> list[str]:
    return [
        *CLI,
        "run",
        str(sim.dataset.path),
        "--outcome",
        str(sim.outcome_path),
        "--response",
        "y",
        "--out",
        str(out),
        "--max-iter",
        "1",
        "--stability",
        "6",
        "--stability-threshold",
        "0.7",
        "--cv-folds",
        "4",
        "--quiet",
        "--no-report",
    ]


def test_run_writes_the_stable_set_and_the_folds_with_their_schemas(study):
    _root, sim, ref = study
    stab = read_table(ref / STABILITY.file)
    assert [c.name for c in STABILITY.fixed] == list(stab.columns)
    assert stab["selection_frequency"].is_monotonic_decreasing
    assert set(sim.true_index.tolist()) <= set(stab.loc[stab["stable"], "index"].tolist())
    man = json.loads((ref / "manifest.json").read_text())
    assert man["stability"]["n_pairs"] == 6 and man["config"]["stability"] == 6
    assert man["stability"]["stable"] == stab.loc[stab["stable"], "feature"].tolist()
    model = read_table(ref / "model.tsv")
    feats = model[model["term"] == "feature"]
    freq = dict(zip(stab["index"], stab["selection_frequency"], strict=True))
    assert feats["selection_frequency"].tolist() == [freq.get(i, 0.0) for i in feats["index"]]
    assert model.loc[model["term"] != "feature", "selection_frequency"].isna().all()
    ranking = read_table(ref / "ranking.tsv")
    assert ranking["selection_frequency"].notna().all()
    cv = read_table(ref / CV.file)
    assert cv["fold"].tolist() == [1, 2, 3, 4] and cv["n_test"].sum() == 160
    assert cv["r2"].notna().all() and cv[["auc", "deviance", "concordance"]].isna().all().all()
    assert man["cv"]["metrics"]["r2"]["mean"] == pytest.approx(cv["r2"].mean())
    page = build_report(ref).read_text()
    assert 'id="fig-stability"' in page and 'alt="Scatter plot of the selection frequencies' in page
    assert "4 folds; screen and refit on the training folds only" in page


def _state(out: Path) -> dict:
    try:
        return json.loads((out / "manifest.json").read_text())
    except (OSError, ValueError):
        return {}


# The killed run's refits each wait 0.25 s first (patched in the child only), so the window in which some
# halves are refitted and others not lasts seconds whatever the machine's speed; results are unchanged.
SLOW_REFITS = (
    "import time\n"
    "import widescreen.workflow._stability as st\n"
    "fit = st.fit_subset\n"
    "def slow(*a, **k):\n"
    "    time.sleep(0.25)\n"
    "    return fit(*a, **k)\n"
    "st.fit_subset = slow\n"
    "from widescreen.cli import main\n"
    "main()\n"
)


def test_a_run_killed_during_its_stability_refits_resumes_to_identical_tables(study):
    root, sim, ref = study
    out = root / "killed"
    args = [sys.executable, "-c", SLOW_REFITS, *_args(sim, out)[len(CLI) :]]
    proc = subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    t0 = time.monotonic()
    try:
        while True:  # kill once some halves are refitted and others not
            halves = _state(out).get("stability_state", {}).get("halves", [])
            done = sum("selected" in h for h in halves)
            if 0 < done < len(halves):
                break
            if proc.poll() is not None:
                pytest.fail(f"the run ended before it was killed: {proc.stderr.read().decode()}")
            if time.monotonic() - t0 > 120:
                pytest.fail("the run made no progress")
            time.sleep(0.002)
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stdout.close()
        proc.stderr.close()
    assert _state(out).get("status") == "running"
    res = subprocess.run(_args(sim, out), capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stderr
    assert "stability selection over 12 half-samples" in res.stdout
    assert "4-fold cross-validation" in res.stdout and "R^2" in res.stdout
    for name in ("stability.tsv", "cv.tsv", "model.tsv", "ranking.tsv"):
        assert (out / name).read_bytes() == (ref / name).read_bytes(), name
