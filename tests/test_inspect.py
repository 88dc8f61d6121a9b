"""Store inspection on stores whose content is known."""

from __future__ import annotations

import numpy as np
import pytest

from tests.conftest import write_store
from widescreen.store import DatasetWriter, StoreError
from widescreen.store._inspect import inspect_dataset


def test_dosage_store(tmp_path, rng):
    X = rng.integers(0, 3, (30, 100)).astype(np.int8)
    X[rng.random(X.shape) < 0.1] = -128
    write_store(tmp_path / "s", X, chunk_features=16)
    r = inspect_dataset(tmp_path / "s")
    assert r.shape == (30, 100) and r.dtype == "int8" and r.value_kind == "dosage"
    assert r.chunks == (30, 16) and r.chunk_grid == (1, 7)
    assert r.missing_rate == pytest.approx(np.mean(X == -128), abs=1e-12)  # numpy count
    assert not r.missing_estimated and r.blocks_read == r.n_blocks == 7
    assert r.size_bytes == sum(f.stat().st_size for f in (tmp_path / "s").rglob("*") if f.is_file())
    assert r.codec == "bytes -> blosc(lz4, clevel=5, bitshuffle) -> crc32c"
    assert r.format_version == 2 and r.creator.startswith("widescreen ")
    assert r.integrity.startswith("CRC-32C per chunk")
    assert not r.has_annotations
    text = r.format()
    assert "30 samples x 100 features" in text and "dosage, int8 (missing = -128)" in text
    assert f"{100 * r.missing_rate:.3g} %" in text and "estimated" not in text


def test_estimate_from_sampled_blocks(tmp_path, rng):
    X = rng.standard_normal((10, 64)).astype(np.float32)
    X[:, :8] = np.nan  # only the first block has missing values
    write_store(tmp_path / "s", X, chunk_features=8)
    full = inspect_dataset(tmp_path / "s")
    assert full.missing_rate == pytest.approx(0.125)
    est = inspect_dataset(tmp_path / "s", sample_blocks=3)
    # Evenly spaced blocks 0, 4 (rounded from 3.5) and 7: one in three is all missing.
    assert est.missing_estimated and est.blocks_read == 3
    assert est.missing_rate == pytest.approx(1 / 3)
    assert "estimated from 3 of 8 feature blocks" in est.format()
    assert "continuous, float32 (missing = NaN)" in est.format()


def test_annotations_and_incomplete_store(tmp_path):
    w = DatasetWriter(tmp_path / "a", ["x", "y"], "dosage", "int8", annotations=True)
    w.append(np.zeros((2, 3), np.int8), ["a", "b", "c"], chrom=["1"] * 3, pos=[1, 2, 3])
    w.finalize()
    assert inspect_dataset(tmp_path / "a").has_annotations
    w = DatasetWriter(tmp_path / "b", ["x"], "continuous", "float32")
    w.append(np.zeros((1, 2), np.float32), ["a", "b"])  # never finalised
    with pytest.raises(StoreError, match="incomplete"):
        inspect_dataset(tmp_path / "b")
