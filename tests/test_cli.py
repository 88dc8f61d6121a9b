"""The command line: help texts, one-line errors, an end-to-end screen."""

from __future__ import annotations

import json

import numpy as np
import pytest
from typer.testing import CliRunner

from widescreen.cli import app
from widescreen.report import read_tsv

runner = CliRunner()


@pytest.mark.parametrize(
    "cmd", ["screen", "run", "report", "simulate", "demo", "import", "inspect"]
)
def test_every_command_has_help(cmd):
    res = runner.invoke(app, [cmd, "--help"])
    assert res.exit_code == 0
    assert "Usage" in res.output


def test_simulate_then_screen(tmp_path):
    store = tmp_path / "s.zarr"
    res = runner.invoke(
        app,
        [
            "simulate",
            str(store),
            "-n",
            "150",
            "-p",
            "600",
            "--true",
            "3",
            "--sigma",
            "1",
            "--seed",
            "4",
            "-q",
        ],
    )
    assert res.exit_code == 0, res.output
    res = runner.invoke(
        app,
        [
            "screen",
            str(store),
            "--outcome",
            f"{store}.outcome.tsv",
            "--response",
            "y",
            "--shortlist",
            "10",
            "--out",
            str(tmp_path / "run"),
            "-q",
        ],
    )
    assert res.exit_code == 0, res.output
    assert "shortlist of 10" in res.output
    # the inflation factor is printed as the manifest records it
    lam = json.loads((tmp_path / "run" / "manifest.json").read_text())["lambda_gc"]["screen"]
    assert f"lambda_GC = {lam:.4f}" in res.output
    ranking = read_tsv(tmp_path / "run" / "ranking.tsv")
    truth = read_tsv(f"{store}.truth.tsv")
    # Three strong effects among 600 noise features at n = 150: all three lead the ranking.
    assert set(ranking["feature"][:3]) == set(truth["feature"])
    assert list(ranking["rank"][:3]) == ["1", "2", "3"]


def test_errors_are_one_line_without_traceback(tmp_path):
    res = runner.invoke(
        app,
        [
            "screen",
            str(tmp_path / "nope.zarr"),
            "--outcome",
            "x.tsv",
            "--response",
            "y",
            "--out",
            str(tmp_path / "r"),
        ],
    )
    assert res.exit_code == 1
    assert "no such store" in res.output
    assert "Traceback" not in res.output
    res = runner.invoke(app, ["inspect", str(tmp_path)])
    assert res.exit_code == 1
    assert "Traceback" not in res.output


def test_bad_shortlist_is_refused(tmp_path):
    res = runner.invoke(
        app,
        [
            "screen",
            "s.zarr",
            "--outcome",
            "o.tsv",
            "--response",
            "y",
            "--out",
            "r",
            "--shortlist",
            "-3",
        ],
    )
    assert res.exit_code != 0
    assert "positive integer or 'auto'" in res.output


def test_simulated_design_is_reproducible(tmp_path):
    from widescreen.simulate import SimulationConfig, simulate

    cfg = SimulationConfig(design="equicorrelated", n_samples=30, n_features=300, n_true=4, seed=9)
    a = simulate(tmp_path / "a.zarr", cfg)
    b = simulate(tmp_path / "b.zarr", cfg)
    np.testing.assert_array_equal(a.dataset.X[:], b.dataset.X[:])
    assert a.outcome_path.read_text() == b.outcome_path.read_text()


def test_demo_runs_the_whole_job(tmp_path):
    res = runner.invoke(
        app, ["demo", "--out", str(tmp_path / "d"), "-n", "300", "-p", "3000", "-q"]
    )
    assert res.exit_code == 0, res.output
    assert "causal" in res.output
    assert f"Writing into {(tmp_path / 'd').resolve()}" in res.output
    # the first screen's inflation factor, as the run's iteration record holds it
    iters = json.loads((tmp_path / "d" / "run" / "manifest.json").read_text())["iterations"]
    assert f"lambda_GC = {iters[0]['threshold'][0]['lambda_gc']:.4f}" in res.output
    for name in ("model.tsv", "iterations.tsv", "ranking.tsv", "manifest.json", "report.html"):
        assert (tmp_path / "d" / "run" / name).is_file()
    # Every causal site's row says how the run treated it; a shortlisted one's marginal rank is
    # the rank ranking.tsv gives it.
    ranking = read_tsv(tmp_path / "d" / "run" / "ranking.tsv")
    rank_of = dict(zip(ranking["feature"], ranking["rank"], strict=True))
    truth = read_tsv(tmp_path / "d" / "reeds.zarr.truth.tsv")
    rows = {ln.split()[0]: ln for ln in res.output.splitlines() if ln.split()[:1] != []}
    for f in truth["feature"]:
        line = rows[f]
        assert "marginal rank" in line or "dropped before screening" in line, line
        if "marginal rank" in line:
            r = line.split("marginal rank ")[1].split(",")[0]
            inside = f"in the {ranking['feature'].size}-site shortlist" in line
            assert inside == (f in rank_of), line
            if inside:
                assert r == rank_of[f], line
