"""Every registered family through every entry point: screen, run (with splitting), resume, arrays.

A family that fails anywhere fails here; the cases come from `family_kit`. The checks are contracts
of the project (a constant feature scores 0, no NaN scores, a rerun resumes to the same bits, the
array route and the file route give the same statistics), not statistical claims: those live in the
family's own tests against outside references.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from widescreen.engine import RunFolder, read_stats
from widescreen.families import FAMILIES, FAMILY_NAMES
from widescreen.report import read_tsv
from widescreen.workflow import (
    IterateConfig,
    Problem,
    ScreenConfig,
    run,
    screen,
    screen_problem,
)

from .family_kit import CONSTANT, MISSING, Case, N, P


def _stats(out) -> dict[str, np.ndarray]:
    return read_stats(RunFolder(out), "screen")


def test_screen_by_files_and_by_arrays(family_case: Case, tmp_path):
    # The file route joins a shuffled table by sample id; the array route is given y in another
    # order with its sample ids: both analyse the same samples in the store's order.
    res = screen(
        family_case.store,
        family_case.outcome,
        ScreenConfig(**family_case.config, covariates=("age",), shortlist=10, list_top=P),
        tmp_path / "r",
    )
    files = _stats(tmp_path / "r")
    assert files["score"].shape == (P,)
    assert not np.isnan(files["score"]).any()
    assert files["score"][CONSTANT] == 0.0
    assert CONSTANT not in res.index
    assert files["missing_rate"][MISSING] == pytest.approx(6 / N)
    ranking = read_tsv(tmp_path / "r" / "ranking.tsv")
    assert len(ranking["feature"]) == P - 1  # the constant feature is never listed
    assert set(FAMILIES[family_case.family].columns) <= set(ranking)
    order = np.random.default_rng(1).permutation(N)
    ev = None if family_case.event is None else family_case.event[order]
    problem = Problem.from_arrays(
        family_case.store,
        family_case.y[order],
        family=family_case.family,
        event=ev,
        covariates=family_case.age[order],
        sample_ids=family_case.sample_ids[order],
    )
    arrays = screen_problem(problem, shortlist=10).statistics
    for c in files:
        np.testing.assert_array_equal(arrays[c], files[c], err_msg=c)
    # A numpy X (other block widths) in the store's order: the same up to rounding.
    in_memory = Problem.from_arrays(
        family_case.X,
        family_case.y,
        family=family_case.family,
        event=family_case.event,
        covariates=family_case.age,
    )
    got = screen_problem(in_memory, shortlist=10).statistics
    np.testing.assert_allclose(got["score"], files["score"], rtol=1e-8, atol=1e-12)


@pytest.mark.parametrize("split", [False, True])
def test_run_fits_and_resumes_to_the_same_model(family_case: Case, tmp_path, split):
    cfg = IterateConfig(**family_case.config, shortlist=6, max_iter=2, n_lambda=15, split=split)
    out = tmp_path / "r"
    first = run(family_case.store, family_case.outcome, cfg, out)
    assert np.all(np.isfinite(first.coef))
    assert CONSTANT not in first.index
    model = (out / "model.tsv").read_text()
    has_intercept = model.splitlines()[1].startswith("(intercept)")
    assert has_intercept == FAMILIES[family_case.family].intercept
    for pre in FAMILIES[family_case.family].pre_passes:
        # A pre-pass (HOLP's Gram matrix) is checkpointed beside the pass it serves, once per half.
        for name in ("screen_a", "screen_b") if split else ("screen",):
            assert (out / "passes" / f"{name}-{pre.name}" / "result.npy").exists()
    again = run(family_case.store, family_case.outcome, cfg, out)
    assert (out / "model.tsv").read_text() == model
    np.testing.assert_array_equal(again.coef, first.coef)
    manifest = json.loads((out / "manifest.json").read_text())
    runs = [r for p in manifest["passes"].values() for r in p["runs"] if r["session"] == 1]
    assert runs and all(r["blocks_computed"] == 0 for r in runs)


def test_help_and_docs_list_every_registered_family():
    from pathlib import Path

    from typer.testing import CliRunner

    from widescreen.cli import app

    root = Path(__file__).resolve().parents[1]
    developers = (root / "DEVELOPERS.md").read_text()
    readme = (root / "README.md").read_text()
    res = CliRunner().invoke(app, ["screen", "--help"], terminal_width=200)
    for name in FAMILY_NAMES:
        assert f"| {name} |" in developers, name
        assert f"`{name}`" in readme, name
        assert name in res.output, name
