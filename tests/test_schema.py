"""The run folder's schema: tables read back by pandas with their documented dtypes, typed records."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import zarr

from widescreen.schema import (
    ENTRIES,
    ITERATIONS,
    MODEL,
    RANKING,
    TABLES,
    Column,
    ManifestRecord,
    format_table,
    read_table,
    stats_frame,
)
from widescreen.store import DatasetWriter
from widescreen.workflow import IterateConfig, ScreenConfig, run, screen

from .conftest import write_outcome


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """A screen with --list 100 and a shortlist of 10, and a run with covariates, on an annotated
    dosage store where one feature matters only given the others (so the run iterates)."""
    root = tmp_path_factory.mktemp("schema")
    rng = np.random.default_rng(11)
    n, p = 160, 400
    ids = [f"s{i}" for i in range(n)]
    X = rng.binomial(2, rng.uniform(0.1, 0.5, p), size=(n, p)).astype(np.int8)
    X[rng.random((n, p)) < 0.02] = -128  # missing values
    chrom = np.repeat(["chr1", "chr2"], [250, 150])
    pos = np.concatenate([np.arange(1, 251) * 100, np.arange(1, 151) * 100])
    w = DatasetWriter(
        root / "s.zarr", ids, "dosage", "int8", n_features=p, chunks=(n, 128), annotations=True
    )
    w.append(X, [f"rs{j}" for j in range(p)], chrom, pos)
    w.finalize()
    Xf = np.where(X == -128, np.nan, X.astype(float))
    Xf = np.where(np.isnan(Xf), np.nanmean(Xf, axis=0), Xf)
    age = rng.normal(50, 10, n)
    y = 1.2 * Xf[:, 5] - 1.0 * Xf[:, 300] + 0.6 * Xf[:, 77] + 0.03 * age + rng.normal(size=n)
    write_outcome(root / "o.tsv", ids, {"y": y.tolist(), "age": age.tolist()})
    screen(
        root / "s.zarr",
        root / "o.tsv",
        ScreenConfig(response="y", shortlist=10, list_top=100),
        root / "screen",
    )
    run(
        root / "s.zarr",
        root / "o.tsv",
        IterateConfig(response="y", covariates=("age",), shortlist=12, max_iter=3),
        root / "run",
    )
    return root


def _expected_dtypes(spec, frame):
    return {c: spec.column(c).dtype for c in frame.columns}


@pytest.mark.parametrize(
    ("folder", "spec"),
    [("screen", RANKING), ("run", RANKING), ("run", MODEL), ("run", ITERATIONS), ("run", ENTRIES)],
)
def test_every_table_round_trips_through_pandas_with_its_dtypes(runs, folder, spec):
    path = runs / folder / spec.file
    text = path.read_text()
    frame = read_table(path)
    # Every column has the dtype its spec documents (pandas' own names).
    assert {c: str(t) for c, t in frame.dtypes.items()} == _expected_dtypes(spec, frame)
    # Fixed columns appear in the spec's order; the family's statistics sit in their slot.
    fixed = [c.name for c in spec.fixed if c.name in frame.columns]
    assert [c for c in frame.columns if c in fixed] == fixed
    assert set(fixed) == {c.name for c in spec.fixed}
    # Written back from pandas' values by the same schema: the same bytes.
    stats = tuple(Column(c, "float64", "") for c in frame.columns if c not in fixed)
    slots = {"statistics": stats} if stats else {}
    back = format_table(spec, {c: frame[c].tolist() for c in frame.columns}, **slots)
    assert back == text
    # A plain pandas read with the documented dtypes gives the same frame.
    plain = pd.read_csv(
        path,
        sep="\t",
        dtype=_expected_dtypes(spec, frame),
        keep_default_na=False,
        na_values={c: ["NA"] for c in frame.columns if c != "feature"},
    )
    pd.testing.assert_frame_equal(plain, frame)


def test_ranking_marks_the_shortlist_and_carries_positions(runs):
    r = read_table(runs / "screen" / "ranking.tsv")
    assert len(r) == 100
    assert r["shortlisted"].tolist() == [True] * 10 + [False] * 90
    assert r["rank"].tolist() == list(range(1, 101))
    # Positions and allele frequencies as the store holds them (read with zarr directly).
    g = zarr.open_group(runs / "s.zarr", mode="r")
    assert r["pos"].tolist() == g["features/pos"][:][r["index"].to_numpy()].tolist()
    X = g["X"][:, r["index"].to_numpy()].astype(float)
    X[X == -128] = np.nan
    np.testing.assert_allclose(r["allele_freq"], np.nanmean(X, axis=0) / 2, rtol=1e-9)
    np.testing.assert_allclose(r["mean"], np.nanmean(X, axis=0), rtol=1e-9)


def test_model_rows_keep_integer_columns_and_agree_with_the_manifest(runs):
    m = read_table(runs / "run" / "model.tsv")
    assert m["term"].tolist()[:2] == ["intercept", "covariate"]
    assert m["feature"].tolist()[:2] == ["(intercept)", "covariate:age"]
    assert str(m["index"].dtype) == "Int64" and str(m["entered"].dtype) == "Int64"
    assert m["index"][:2].isna().all() and m["index"][2:].notna().all()
    assert {"chrom", "pos", "allele_freq", "mean"} <= set(m.columns)
    man = json.loads((runs / "run" / "manifest.json").read_text())
    rec = ManifestRecord.from_dict(man)
    assert rec.model is not None
    # The manifest's intercept is model.tsv's (both for the features as stored).
    assert float(m["coefficient"][0]) == pytest.approx(rec.model.intercept, rel=1e-9)
    feats = m[m["term"] == "feature"]
    assert feats["feature"].tolist() == list(rec.model.features)
    np.testing.assert_allclose(feats["coefficient"], rec.model.coefficient, rtol=1e-9)
    assert feats["entered"].tolist() == rec.model.entered.tolist()


def test_entries_is_the_long_form_of_the_iterations(runs):
    it = read_table(runs / "run" / "iterations.tsv")
    en = read_table(runs / "run" / "entries.tsv")
    counts = en.groupby(["iteration", "event"]).size().unstack(fill_value=0)
    for _, row in it.iterrows():
        got = counts.loc[row["iteration"]] if row["iteration"] in counts.index else {}
        assert int(got.get("entered", 0)) == row["entered"]
        assert int(got.get("left", 0)) == row["left"]
    # Replaying the entries gives the final model's features.
    selected: set[str] = set()
    for _, e in en.sort_values("iteration", kind="stable").iterrows():
        (selected.add if e["event"] == "entered" else selected.discard)(e["feature"])
    m = read_table(runs / "run" / "model.tsv")
    assert selected == set(m.loc[m["term"] == "feature", "feature"])
    assert it["selected"].iloc[-1] == len(selected)


def test_manifest_reads_as_typed_records_and_back(runs):
    for folder in ("screen", "run"):
        raw = json.loads((runs / folder / "manifest.json").read_text())
        rec = ManifestRecord.from_dict(raw)
        assert json.loads(json.dumps(rec.to_dict())) == raw
    rec = ManifestRecord.from_dict(json.loads((runs / "run" / "manifest.json").read_text()))
    assert rec.iterations[0].iteration == 0 and rec.iterations[0].passes == ("screen",)
    assert rec.iterations[0].model.path is not None
    assert rec.shortlist == 12
    assert rec.passes["screen"].blocks_computed == 4  # 400 features in chunks of 128


def test_statistics_join_the_store_ids(runs):
    frame = stats_frame(runs / "screen", "screen", start=100, stop=230)
    g = zarr.open_group(runs / "s.zarr", mode="r")
    assert frame.index.tolist() == [str(s) for s in g["features/id"][100:230]]
    assert frame["index"].tolist() == list(range(100, 230))
    s = zarr.open_group(runs / "screen" / "passes" / "screen" / "stats", mode="r")
    np.testing.assert_array_equal(frame["p_value"].to_numpy(), s["p_value"][100:230])


def test_a_table_that_does_not_match_its_schema_is_refused():
    with pytest.raises(ValueError, match=r"entries\.tsv: columns do not match.*missing \['index'"):
        format_table(ENTRIES, {"iteration": [1], "event": ["entered"], "feature": ["a"]})
    good = {"iteration": [1], "event": ["entered"], "feature": ["a"], "index": [3.5]}
    good["coefficient"] = [0.1]
    with pytest.raises(ValueError, match=r"column 'index', row 1: not an integer"):
        format_table(ENTRIES, good)
    assert set(TABLES) == {
        "ranking.tsv",
        "model.tsv",
        "iterations.tsv",
        "entries.tsv",
        "stability.tsv",
        "cv.tsv",
        "traits.tsv",
    }


def test_the_readme_documents_every_column_with_its_dtype():
    from pathlib import Path

    text = (Path(__file__).parents[1] / "README.md").read_text()
    for spec in TABLES.values():
        section = text[text.index(f"`{spec.file}` (") :]
        section = section[: section.index("\n\n", section.index("| column |"))]
        for c in spec.fixed:
            lines = [r for r in section.splitlines() if r.startswith("| ")]
            rows = [r for r in lines if f"`{c.name}`" in r.split("|")[1]]
            assert rows, f"{spec.file}: README lacks column {c.name}"
            dtype = rows[0].split("|")[2].strip()
            assert dtype in ("", c.dtype) or c.dtype in dtype.split(", "), (spec.file, c.name)
