"""Categorical covariates: dummy coding in the outcome table and the Python API, checked against pandas and
statsmodels' formula (treatment) coding, and the screen's adjustment against statsmodels joint fits."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import scipy.stats as ss
import statsmodels.api as sm
import statsmodels.formula.api as smf

from widescreen.engine import RunFolder, read_stats
from widescreen.store import OutcomeError, code_covariate_frame, code_covariates
from widescreen.workflow import ScreenConfig, screen
from widescreen.workflow._problem import problem_from_arrays

from .conftest import write_outcome, write_store


def test_text_columns_are_dummy_coded_like_pandas_get_dummies(rng):
    batch = rng.choice(["plateC", "plateA", "plateB"], 60)
    age = rng.uniform(20, 70, 60).round(1)
    coding = code_covariates({"age": age.astype(str), "batch": batch})
    # pandas.get_dummies(drop_first=True): one column per level but the first in sorted order
    ref = pd.get_dummies(pd.Series(batch), drop_first=True, dtype=float)
    assert coding.names == ("age", "batch:plateB", "batch:plateC")
    np.testing.assert_array_equal(coding.matrix[:, 0], age)
    np.testing.assert_array_equal(coding.matrix[:, 1:], ref.to_numpy())
    assert coding.levels == {"batch": ["plateA", "plateB", "plateC"]}
    assert coding.record()["categorical"]["batch"]["reference"] == "plateA"


@pytest.mark.parametrize(
    ("values", "message"),
    [
        (np.array(["a"] * 30), "single level"),
        (np.array([f"id{i}" for i in range(30)]), "30 levels for 30 samples"),
        (np.array(["3.5"] * 30), "constant"),
    ],
)
def test_unusable_covariates_are_refused_with_the_column_named(values, message):
    with pytest.raises(OutcomeError, match=f"'batch'.*{message}|{message}.*'batch'"):
        code_covariates({"batch": values}, where="pheno.tsv")


def test_dataframe_category_and_object_columns_are_coded_in_the_api(rng):
    n = 80
    frame = pd.DataFrame(
        {
            "sex": pd.Categorical(rng.choice(["m", "f"], n)),
            "site": rng.choice(["north", "east", "south"], n).astype(object),
            "age": rng.normal(50, 10, n),
        }
    )
    coding = code_covariate_frame(frame)
    assert coding.names == ("sex:m", "site:north", "site:south", "age")
    # statsmodels/patsy treatment coding (reference: the first level in sorted order)
    ref = smf.ols("age ~ C(sex) + C(site)", frame).exog[:, 1:]
    np.testing.assert_array_equal(coding.matrix[:, :3], ref)
    prob = problem_from_arrays(rng.standard_normal((n, 5)), rng.standard_normal(n), "linear", frame)
    assert prob.covariates.shape == (n, 4) and prob.covariate_coding["columns"] == list(
        coding.names
    )


def test_screen_adjusts_for_a_text_covariate_as_statsmodels_does(tmp_path, rng):
    n, p = 150, 6
    X = rng.standard_normal((n, p))
    batch = rng.choice(["plateA", "plateB", "plateC"], n)
    shift = {"plateA": 0.0, "plateB": 0.8, "plateC": -0.6}
    X[:, 0] += np.array([shift[b] for b in batch])  # a feature that differs by batch
    eta = -0.2 + np.array([shift[b] for b in batch]) + 0.5 * X[:, 1]
    y = (rng.random(n) < 1 / (1 + np.exp(-eta))).astype(int)
    ids = [f"s{i}" for i in range(n)]
    store = write_store(tmp_path / "s.zarr", X, sample_ids=ids)
    table = write_outcome(tmp_path / "o.tsv", ids, {"y": y, "batch": batch})
    cfg = ScreenConfig(response="y", family="logistic", covariates=("batch",), shortlist=3)
    screen(store.path, table, cfg, tmp_path / "run")
    got = read_stats(RunFolder(tmp_path / "run"), "screen", ("beta", "lr_chi2", "p_value"))
    # statsmodels GLM Binomial, formula y ~ C(batch) + x (treatment coding, plateA the reference):
    # beta of x and the likelihood-ratio statistic against y ~ C(batch), chi-square(1) p-value
    df = pd.DataFrame({"y": y, "batch": batch})
    null = smf.glm("y ~ C(batch)", df, family=sm.families.Binomial()).fit(tol=1e-14)
    for j in range(p):
        full = smf.glm("y ~ C(batch) + x", df.assign(x=X[:, j]), family=sm.families.Binomial()).fit(
            tol=1e-14
        )
        lr = 2 * (full.llf - null.llf)
        np.testing.assert_allclose(got["beta"][j], full.params["x"], rtol=1e-6)
        np.testing.assert_allclose(got["lr_chi2"][j], lr, rtol=1e-6, atol=1e-9)
        np.testing.assert_allclose(got["p_value"][j], ss.chi2.sf(lr, 1), rtol=1e-5)
    manifest = json.loads((tmp_path / "run" / "manifest.json").read_text())
    assert manifest["covariates"]["categorical"]["batch"]["levels"] == [
        "plateA",
        "plateB",
        "plateC",
    ]
    assert manifest["covariates"]["columns"] == ["batch:plateB", "batch:plateC"]


def test_new_data_are_coded_with_the_fitted_levels():
    fitted = code_covariates({"site": np.array(["b", "a", "c"] * 10)})
    # a prediction set lacking level "b" still gets both dummy columns, in the fitted order
    new = code_covariate_frame({"site": np.array(["c", "a", "c"])}, levels=fitted.levels)
    assert new.names == fitted.names == ("site:b", "site:c")
    np.testing.assert_array_equal(new.matrix, [[0, 1], [0, 0], [0, 1]])
    with pytest.raises(OutcomeError, match="'site' has level 'd'"):
        code_covariate_frame({"site": np.array(["a", "d"])}, levels=fitted.levels)


def test_estimators_take_a_text_covariate_and_code_new_data_with_the_fitted_levels(rng):
    from widescreen.api import IterativeScreeningModel, ScreeningSelector

    n, p = 160, 40
    X = rng.standard_normal((n, p))
    batch = rng.choice(["plateA", "plateB", "plateC"], n)
    shift = pd.Series(batch).map({"plateA": 0.0, "plateB": 1.5, "plateC": -1.0}).to_numpy()
    y = shift + 1.2 * X[:, 3] + rng.standard_normal(n)
    ids = [f"s{i}" for i in range(n)]
    Xf = pd.DataFrame(X, index=ids, columns=[f"f{j}" for j in range(p)])
    Z = pd.DataFrame({"batch": batch, "age": rng.uniform(20, 70, n)}, index=ids)
    sel = ScreeningSelector(shortlist=5).fit(Xf, pd.Series(y, index=ids), covariates=Z)
    assert list(sel.covariate_names_) == ["batch:plateB", "batch:plateC", "age"]
    assert sel.covariate_levels_ == {"batch": ["plateA", "plateB", "plateC"]}
    assert sel.ranking_[0] == 3
    model = IterativeScreeningModel(shortlist=5, covariates=Z).fit(Xf, pd.Series(y, index=ids))
    assert list(model.selected_) == [3]
    # the unpenalised refit of y ~ 1 + C(batch) + age + f3 (statsmodels OLS, treatment coding) is
    # where a single selected feature's refitted coefficients must land when the penalty leaves it
    df = Z.assign(y=y, f3=X[:, 3])
    ols = smf.ols("y ~ C(batch) + age + f3", df).fit()
    eta_ref = ols.fittedvalues.to_numpy()
    eta = model.linear_predictor(Xf, covariates=Z)
    assert np.corrcoef(eta, eta_ref)[0, 1] > 0.99
    # one new sample of plateC: coded with the fitted levels (two dummies), no constancy refusal
    one = Z.iloc[[0]].assign(batch="plateC")
    assert model.predict(Xf.iloc[[0]], covariates=one).shape == (1,)
    with pytest.raises(ValueError, match="'batch' has level 'plateD'"):
        model.predict(Xf.iloc[[0]], covariates=one.assign(batch="plateD"))
