"""The array-level core: `Problem.from_arrays` validates and aligns like the file route."""

from __future__ import annotations

import numpy as np
import pytest

from widescreen.store import OutcomeError
from widescreen.workflow import Problem, ScreenConfig

from .conftest import write_store


@pytest.fixture
def store(tmp_path, rng):
    return write_store(tmp_path / "x.zarr", rng.normal(size=(20, 30)), chunk_features=8)


def test_sample_ids_align_y_to_the_store_and_select_a_subset(store, rng):
    y = rng.normal(size=20)
    ids = np.array([f"s{i}" for i in range(20)])
    order = rng.permutation(20)[:15]
    p = Problem.from_arrays(store, y[order], sample_ids=ids[order])
    assert p.n == 15
    np.testing.assert_array_equal(p.rows, np.sort(order))  # analysed in the store's order
    np.testing.assert_array_equal(p.response.y, y[np.sort(order)])
    np.testing.assert_array_equal(p.sample_ids, ids[np.sort(order)])


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"sample_ids": ["s1", "s2", "zz", *[f"s{i}" for i in range(3, 20)]]}, "not in the store"),
        ({"sample_ids": ["s1"] * 20}, "'s1' appears twice"),
        ({"y": np.zeros(19)}, "y has 19 values but X has 20 samples"),
        ({"y": np.r_[np.nan, np.ones(19)]}, r"y\[0\]: value is not finite"),
        ({"family": "logistic", "y": np.array(list("abc") * 6 + ["a", "b"])}, "two labels"),
        ({"family": "cox"}, "needs an event indicator"),
        ({"family": "linear", "event": np.ones(20)}, "takes no event"),
        ({"covariates": np.ones(20)}, "covariate 'z0' is constant"),
        ({"y": np.arange(3.0), "sample_ids": ["s0", "s1", "s2"]}, "got n_samples = 3"),
    ],
)
def test_bad_arrays_are_refused_with_where(store, kwargs, message):
    kw = {"y": np.arange(20.0), **kwargs}
    y = kw.pop("y")
    with pytest.raises(OutcomeError, match=message):
        Problem.from_arrays(store, y, **kw)


def test_labels_and_survival_from_arrays(store):
    labels = np.array(["ctrl", "case"] * 10)
    p = Problem.from_arrays(store, labels, family="logistic")
    assert p.response.mapping == {"case": 0, "ctrl": 1}
    np.testing.assert_array_equal(p.response.y, (labels == "ctrl").astype(float))
    ids = np.array([f"s{i}" for i in range(20)])
    event = np.r_[np.ones(10), np.zeros(9), 2.0]
    with pytest.raises(
        OutcomeError, match=r"event, sample 's19': '2\.0' is not an event indicator"
    ):
        Problem.from_arrays(store, np.arange(1.0, 21.0), family="cox", event=event, sample_ids=ids)


def test_configs_validate_every_field_in_one_line():
    from widescreen._config import ConfigError

    for kwargs, field in [
        ({"shortlist": 0}, "shortlist"),
        ({"family": "probit"}, "family"),
        ({"drop_missing": 1.5}, "drop_missing"),
        ({"drop_rare": -0.1}, "drop_rare"),
        ({"list_top": 0}, "list_top"),
        ({"sub_block": 0}, "sub_block"),
        ({"covariates": ("age", "age")}, "covariates"),
    ]:
        with pytest.raises(ConfigError) as info:
            ScreenConfig(response="y", **kwargs)
        assert info.value.field == field and "\n" not in str(info.value)
    assert ScreenConfig(response="y", covariates=["a", "b"]).covariates == ("a", "b")


@pytest.mark.parametrize(
    ("option", "message"),
    [
        # Refused while the command line is parsed (cli/_options.py), before any file is read.
        (["--alpha", "2"], "'--alpha': must be between 0 and 1 (exclusive); got 2"),
        (["--max-iter", "-1"], "'--max-iter': must be an integer of at least 0; got -1"),
    ],
)
def test_cli_reports_a_bad_value_in_one_line_not_as_a_bug(tmp_path, option, message):
    from typer.testing import CliRunner

    from widescreen.cli import app

    args = ["run", str(tmp_path / "x.zarr"), "--outcome", str(tmp_path / "o.tsv")]
    res = CliRunner().invoke(app, [*args, "--response", "y", "--out", str(tmp_path / "r"), *option])
    assert res.exit_code in (1, 2)
    assert message in res.output and "a bug" not in res.output
    assert len(res.output.strip().splitlines()) == 1
