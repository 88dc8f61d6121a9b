""".npy import: round trips against the array numpy itself loads, conversions and bad input."""

from __future__ import annotations

import numpy as np
import pytest

import widescreen.store._ingest_npy as ingest
from widescreen.store import StoreError, open_dataset
from widescreen.store._ingest_npy import import_npy
from widescreen.store._ingest_text import IngestError


@pytest.mark.parametrize("order", ["C", "F"])
@pytest.mark.parametrize("dtype", ["float32", "float64"])
def test_float_round_trip(tmp_path, rng, order, dtype, monkeypatch):
    monkeypatch.setattr(ingest, "MEMORY_BUDGET", 19 * 8 * 12)  # several column groups
    X = np.asarray(rng.standard_normal((19, 53)), dtype=dtype, order=order)
    X[3, 7] = np.nan
    src = tmp_path / "x.npy"
    np.save(src, X)
    ds = import_npy(src, tmp_path / "s", chunk_features=8)
    np.testing.assert_array_equal(ds.X[:], np.load(src))  # reference: numpy's loader
    assert ds.dtype == np.dtype(dtype) and ds.attrs.value_kind == "continuous"
    assert list(ds.sample_ids()) == [f"s{i}" for i in range(1, 20)]
    assert list(ds.feature_ids())[-1] == "f53"


def test_int8_is_dosage_with_ids_from_files(tmp_path, rng):
    X = rng.integers(0, 3, (6, 9)).astype(np.int8)
    X[0, 0] = -128
    np.save(tmp_path / "g.npy", X)
    (tmp_path / "s.txt").write_text("\n".join(f"ind{i}" for i in range(6)) + "\n")
    (tmp_path / "f.txt").write_text("\n".join(f"snp{j}" for j in range(9)))
    calls = []
    ds = import_npy(
        tmp_path / "g.npy",
        tmp_path / "s",
        sample_ids=tmp_path / "s.txt",
        feature_ids=tmp_path / "f.txt",
        chunk_features=4,
        progress=lambda d, t: calls.append((d, t)),
    )
    assert ds.attrs.value_kind == "dosage" and ds.dtype == np.int8
    np.testing.assert_array_equal(ds.X[:], X)
    assert list(ds.sample_ids()) == [f"ind{i}" for i in range(6)]
    assert list(ds.feature_ids()) == [f"snp{j}" for j in range(9)]
    assert calls == [(4, 9), (8, 9), (9, 9)]


def test_float_as_dosage_and_int8_as_continuous(tmp_path):
    F = np.array([[0.0, 1.0], [np.nan, 2.0]])
    np.save(tmp_path / "f.npy", F)
    ds = import_npy(tmp_path / "f.npy", tmp_path / "a", value_kind="dosage")
    np.testing.assert_array_equal(ds.X[:], [[0, 1], [-128, 2]])
    G = np.array([[0, -128], [2, 1]], np.int8)
    np.save(tmp_path / "g.npy", G)
    ds = import_npy(tmp_path / "g.npy", tmp_path / "b", value_kind="continuous")
    np.testing.assert_array_equal(ds.X[:], [[0.0, np.nan], [2.0, 1.0]])


def test_bad_inputs(tmp_path):
    np.save(tmp_path / "bad.npy", np.array([[0, 1], [3, 2]], np.int8))
    with pytest.raises(
        IngestError, match=r"row 2 \(sample 's2'\), column 1 \(feature 'f1'\): value 3"
    ):
        import_npy(tmp_path / "bad.npy", tmp_path / "s")
    with pytest.raises(StoreError):
        open_dataset(tmp_path / "s")
    np.save(tmp_path / "i.npy", np.zeros((2, 2), np.int32))
    with pytest.raises(IngestError, match="needs value_kind"):
        import_npy(tmp_path / "i.npy", tmp_path / "s")
    np.save(tmp_path / "v.npy", np.zeros(3))
    with pytest.raises(IngestError, match="need a 2-d array"):
        import_npy(tmp_path / "v.npy", tmp_path / "s")
    np.save(tmp_path / "ok.npy", np.zeros((2, 3)))
    with pytest.raises(IngestError, match="2 feature ids for 3 features"):
        import_npy(tmp_path / "ok.npy", tmp_path / "s", feature_ids=["a", "b"])
    with pytest.raises(IngestError, match="duplicate sample id 'a' at line 1 and line 2"):
        import_npy(tmp_path / "ok.npy", tmp_path / "s", sample_ids=["a", "a"])
