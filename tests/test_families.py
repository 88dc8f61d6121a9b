"""Every family through the whole screen, and the outcome validation rules of the GLM families."""

from __future__ import annotations

import numpy as np
import pytest

from widescreen.families import FAMILIES
from widescreen.report import read_tsv
from widescreen.simulate import SimulationConfig, simulate
from widescreen.store import OutcomeError
from widescreen.workflow import ScreenConfig, screen

from .conftest import write_outcome, write_store

SIMULATED = ("logistic", "poisson", "cox")  # the others screen a linear outcome


@pytest.mark.parametrize("family", sorted(FAMILIES))
def test_family_finds_strong_signals(tmp_path, family):
    model = family if family in SIMULATED else "linear"
    sim = simulate(
        tmp_path / "s.zarr",
        SimulationConfig(
            n_samples=200,
            n_features=900,
            n_true=3,
            family=model,
            sigma=1.0,
            seed=11,
            chunk_features=256,
        ),
    )
    cfg = ScreenConfig(
        response="time" if model == "cox" else "y",
        event="event" if model == "cox" else None,
        family=family,
        shortlist=10,
    )
    res = screen(sim.dataset.path, sim.outcome_path, cfg, tmp_path / "run")
    ranking = read_tsv(tmp_path / "run" / "ranking.tsv")
    assert list(ranking)[:3] == ["feature", "rank", "score"]
    # Three effects scaled to |beta| <= 1 (GLMs) or a + |Z| (linear) at n = 200: all in the top 10.
    assert set(sim.true_index) <= set(res.index.tolist())
    assert np.isfinite(ranking["score"].astype(float)).all()


def test_holp_gram_pass_equals_in_memory_projection(tmp_path, rng):
    # HOLP (Wang & Leng 2016): beta = X^T (X X^T)^-1 y with centred X and y; reference: numpy pinv.
    n, p = 40, 300
    X = rng.normal(size=(n, p))
    y = X[:, 3] + rng.normal(size=n)
    ds = write_store(tmp_path / "h.zarr", X, chunk_features=64)
    table = write_outcome(
        tmp_path / "o.tsv", [f"s{i}" for i in range(n)], {"y": [repr(float(v)) for v in y]}
    )
    screen(
        ds.path,
        table,
        ScreenConfig(response="y", family="holp", shortlist=5, list_top=p),
        tmp_path / "r",
    )
    rank = read_tsv(tmp_path / "r" / "ranking.tsv")
    Xc = X - X.mean(0)
    ref = np.linalg.pinv(Xc) @ (y - y.mean())
    got = np.empty(p)
    got[rank["index"].astype(int)] = rank["beta"].astype(float)
    np.testing.assert_allclose(got, ref, rtol=1e-6, atol=1e-9)


def _joined_table(tmp_path, n, cols):
    ds = write_store(tmp_path / "d.zarr", np.random.default_rng(0).normal(size=(n, 20)))
    return ds, write_outcome(tmp_path / "o.tsv", [f"s{i}" for i in range(n)], cols)


def test_binary_labels_are_mapped_and_reported(tmp_path):
    labels = ["case" if i % 3 == 0 else "control" for i in range(30)]
    ds, table = _joined_table(tmp_path, 30, {"status": labels})
    screen(
        ds.path,
        table,
        ScreenConfig(response="status", family="logistic", shortlist=3),
        tmp_path / "r",
    )
    import json

    m = json.loads((tmp_path / "r" / "manifest.json").read_text())
    assert m["response_coding"] == {"case": 0, "control": 1}


@pytest.mark.parametrize(
    ("family", "cols", "message"),
    [
        ("logistic", {"y": ["a", "b", "c"] * 10}, "0/1 or two labels"),
        (
            "poisson",
            {"y": ["1", "2", "-1"] * 10},
            "line 4: '-1' is not a non-negative integer count",
        ),
        ("poisson", {"y": ["1", "2.5", "1"] * 10}, "line 3: '2.5' is not a non-negative integer"),
        (
            "cox",
            {"t": ["1", "0", "2"] * 10, "e": ["1"] * 30},
            "column 't', line 3: '0' is not a positive time",
        ),
        (
            "cox",
            {"t": ["1", "3", "2"] * 10, "e": ["1", "2", "0"] * 10},
            "column 'e', line 3: '2' is not an event",
        ),
    ],
)
def test_bad_outcomes_name_column_and_line(tmp_path, family, cols, message):
    ds, table = _joined_table(tmp_path, 30, cols)
    cfg = ScreenConfig(
        response=next(iter(cols)), family=family, event="e" if family == "cox" else None
    )
    with pytest.raises(OutcomeError, match=message):
        screen(ds.path, table, cfg, tmp_path / "r")


def test_cox_needs_event_column(tmp_path):
    ds, table = _joined_table(tmp_path, 30, {"t": ["1", "2", "3"] * 10})
    with pytest.raises(OutcomeError, match="needs --event"):
        screen(ds.path, table, ScreenConfig(response="t", family="cox"), tmp_path / "r")
