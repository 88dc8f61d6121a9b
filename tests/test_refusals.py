"""What a run refuses, and what it counts: every feature left out of a pass is counted with its
reason, a response with nothing to explain is refused before a run folder exists, and a changed
outcome table is refused like a changed configuration, saying what changed."""

from __future__ import annotations

import json

import numpy as np
import pytest
from typer.testing import CliRunner

from widescreen.cli import app
from widescreen.engine import RunFolderError
from widescreen.store import OutcomeError
from widescreen.workflow import ScreenConfig, screen

from .conftest import write_outcome, write_store

N, P = 60, 40


@pytest.fixture
def study(tmp_path, rng):
    X = rng.standard_normal((N, P)).astype(np.float32)
    age = rng.uniform(20, 70, N).round(1)
    X[:, 3] = 1.5  # constant
    X[:, 7] = 2 * age - 1  # explained by the covariate: degenerate once age is adjusted for
    y = X[:, 10] + rng.standard_normal(N)
    ids = [f"s{i}" for i in range(N)]
    ds = write_store(tmp_path / "x.zarr", X, chunk_features=16, sample_ids=ids)
    out = write_outcome(tmp_path / "y.tsv", ids, {"y": y, "age": age, "flat": np.full(N, 3.0)})
    return tmp_path, ds, out, y, age


def test_every_feature_left_out_is_counted_with_its_reason(study):
    root, ds, outcome, _y, _age = study
    cfg = ScreenConfig(response="y", covariates=("age",), shortlist=P)
    res = screen(ds.path, outcome, cfg, root / "run")
    s = res.pass_result
    assert s.left_out == {"filtered": 0, "constant": 1, "degenerate": 1, "not finite": 0}
    # every feature is either in the ranking or counted as left out
    assert res.index.size + sum(s.left_out.values()) == P
    assert 3 not in set(res.index) and 7 not in set(res.index)
    man = json.loads((root / "run" / "manifest.json").read_text())
    assert man["passes"]["screen"]["left_out"] == s.left_out
    cli = CliRunner().invoke(
        app,
        [
            *("screen", str(ds.path), "--outcome", str(outcome), "--response", "y"),
            *("--covariates", "age", "--out", str(root / "cli"), "--quiet", "--no-report"),
        ],
    )
    assert cli.exit_code == 0, cli.output
    assert "1 constant, 1 degenerate, 0 not finite" in cli.output


@pytest.mark.parametrize(
    ("response", "covariates", "says"),
    [
        ("flat", (), r"y\.tsv: column 'flat' is constant over the 60 analysed samples"),
        ("age", ("age",), r"y\.tsv: column 'age' is fully explained by the covariates"),
    ],
)
def test_response_with_nothing_to_explain_is_refused_before_a_run_folder(
    study, response, covariates, says
):
    root, ds, outcome, _y, _age = study
    with pytest.raises(OutcomeError, match=says):
        screen(ds.path, outcome, ScreenConfig(response=response, covariates=covariates), root / "r")
    assert not (root / "r").exists()


def test_changed_outcome_table_is_refused_listing_the_change(study, rng):
    root, ds, outcome, y, age = study
    cfg = ScreenConfig(response="y", covariates=("age",))
    out = root / "run"
    screen(ds.path, outcome, cfg, out)
    ids = [f"s{i}" for i in range(N)]
    # the same analysed values, rows in another order and another unused column: still resumes
    write_outcome(
        outcome, ids, {"y": y, "age": age, "other": np.zeros(N)}, order=rng.permutation(N)
    )
    screen(ds.path, outcome, cfg, out)
    # one response value changed
    y2 = y.copy()
    y2[5] += 1.0
    write_outcome(outcome, ids, {"y": y2, "age": age})
    with pytest.raises(RunFolderError, match=r"outcome table: the values of column 'y' changed"):
        screen(ds.path, outcome, cfg, out)
    # a sample dropped
    write_outcome(outcome, ids[:-1], {"y": y[:-1], "age": age[:-1]})
    with pytest.raises(RunFolderError, match=r"outcome table: the analysed samples changed"):
        screen(ds.path, outcome, cfg, out)
    res = screen(ds.path, outcome, cfg, out, restart=True)
    assert res.pass_result.blocks_reused == 0
