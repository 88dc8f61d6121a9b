"""Simulated designs reproduce the published constructions (CHECKS.md)."""

from __future__ import annotations

import numpy as np
import pytest

from widescreen.report import read_tsv
from widescreen.simulate import SimulationConfig, simulate


def _load(sim):
    X = sim.dataset.X[:].astype(np.float64)
    table = read_tsv(sim.outcome_path)
    pos = {s: i for i, s in enumerate(table["sample"])}
    order = [pos[s] for s in sim.dataset.sample_ids()]
    return X, {k: v[order] for k, v in table.items()}


def test_hidden_design_correlations(tmp_path):
    # Fan & Lv 2008, Section 4.2.2: cov(y, x4) = 0; [derived, CHECKS.md] corr(y, x1) = 0.40291 and
    # corr(y, x5) = 0.1591 at rho = 0.5, sigma = 1.
    cfg = SimulationConfig(design="hidden", n_samples=40_000, n_features=8, rho=0.5, seed=3)
    sim = simulate(tmp_path / "h.zarr", cfg)
    X, t = _load(sim)
    y = t["y"].astype(float)
    r = [np.corrcoef(X[:, j], y)[0, 1] for j in sim.true_index]
    se = 1.0 / np.sqrt(cfg.n_samples)  # Monte Carlo error of a sample correlation
    assert r[0] == pytest.approx(0.40291, abs=4 * se)
    assert r[3] == pytest.approx(0.0, abs=4 * se)
    assert r[4] == pytest.approx(0.1591, abs=4 * se)
    noise = [j for j in range(8) if j not in sim.true_index]
    # every noise pair has correlation rho, x4 has sqrt(rho) with the others
    assert np.corrcoef(X[:, noise[0]], X[:, noise[1]])[0, 1] == pytest.approx(0.5, abs=4 * se)
    assert np.corrcoef(X[:, sim.true_index[3]], X[:, noise[0]])[0, 1] == pytest.approx(
        np.sqrt(0.5), abs=4 * se
    )


def test_hidden_binary_version_cancels(tmp_path):
    # Fan, Samworth & Wu 2009 (from memory): beta = (4, 4, 4, -6 sqrt 2) makes x4 marginally invisible
    # because 3 * 4 * sqrt(0.5) - 6 sqrt(2) = 0.
    sim = simulate(
        tmp_path / "b.zarr",
        SimulationConfig(design="hidden", family="logistic", n_samples=50, n_features=10),
    )
    np.testing.assert_allclose(sim.true_coef, [4, 4, 4, -6 * np.sqrt(2)])
    assert 3 * 4 * np.sqrt(0.5) + sim.true_coef[3] == pytest.approx(0.0, abs=1e-12)


def test_independent_design_coefficients(tmp_path):
    # Fan & Lv 2008 simulation I (from memory): |beta_j| = a + |Z| >= a = 4 log n / sqrt n.
    n = 200
    sim = simulate(
        tmp_path / "i.zarr", SimulationConfig(n_samples=n, n_features=1000, n_true=8, seed=1)
    )
    a = 4 * np.log(n) / np.sqrt(n)
    assert (np.abs(sim.true_coef) >= a).all()
    assert sim.true_index.size == 8


@pytest.mark.parametrize("family", ["logistic", "poisson", "cox"])
def test_outcome_families(tmp_path, family):
    sim = simulate(
        tmp_path / "k.zarr", SimulationConfig(n_samples=100, n_features=50, n_true=3, family=family)
    )
    _, t = _load(sim)
    if family == "logistic":
        assert set(t["y"]) <= {"0", "1"}
    elif family == "poisson":
        assert (t["y"].astype(float) >= 0).all()
    else:
        assert (t["time"].astype(float) > 0).all() and set(t["event"]) <= {"0", "1"}


def test_dosage_design_values(tmp_path):
    sim = simulate(
        tmp_path / "d.zarr",
        SimulationConfig(design="dosage", n_samples=80, n_features=300, n_true=3),
    )
    X = sim.dataset.X[:]
    assert X.dtype == np.int8
    assert set(np.unique(X)) <= {-128, 0, 1, 2}


@pytest.mark.parametrize("family", ["logistic", "poisson", "cox"])
@pytest.mark.parametrize("design", ["independent", "hidden", "dosage"])
def test_outcomes_follow_the_truth_tables_model(tmp_path, family, design):
    # The outcome is drawn from exactly the stated model (no clipping): refitting that model on the
    # true features with statsmodels (GLM Binomial / Poisson, PHReg) recovers the truth table's
    # coefficients within sampling error, and the counts show no extra-Poisson variation.
    import statsmodels.api as sm
    from statsmodels.duration.hazard_regression import PHReg

    sim = simulate(
        tmp_path / "m.zarr",
        SimulationConfig(
            design=design, n_samples=3000, n_features=40, n_true=3, family=family, seed=5
        ),
    )
    X, t = _load(sim)
    truth = read_tsv(sim.truth_path)
    idx = truth["index"].astype(int)
    coef = truth["coefficient"].astype(float)
    Xt = X[:, idx]
    if design == "dosage":
        Xt = np.where(Xt == -128, 0.0, Xt)  # a missing call contributes nothing (see simulate)
        cov = np.column_stack([t["age"].astype(float) - 45, t["batch"].astype(float)])
        Xt, coef = np.column_stack([Xt, cov]), np.concatenate([coef, [0.03, 0.4]])
    if family == "cox":
        fit = PHReg(t["time"].astype(float), Xt, status=t["event"].astype(float)).fit()
        est, se = fit.params, fit.bse
    else:
        fam = sm.families.Binomial() if family == "logistic" else sm.families.Poisson()
        fit = sm.GLM(t["y"].astype(float), sm.add_constant(Xt), family=fam).fit()
        est, se = fit.params[1:], fit.bse[1:]
        assert abs(fit.params[0]) < 4 * fit.bse[0]  # no hidden intercept
        if family == "poisson":
            # Pearson X2 / df near 1 for Poisson data (McCullagh & Nelder 1989, sec. 4.5.2)
            assert abs(fit.pearson_chi2 / fit.df_resid - 1) < 0.1
    assert np.all(np.abs(est - coef) < 4.5 * se), (est, coef, se)
