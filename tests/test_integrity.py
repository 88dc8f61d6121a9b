"""Store integrity: per-chunk CRC-32C checksums, the table of chunk positions, the range of dosages,
the fingerprint, every node validated, and stores of format version 1 still opening with a note."""

from __future__ import annotations

import json
import os
import shutil

import google_crc32c
import numpy as np
import pytest
import zarr
from zarr.codecs import BloscCodec

from widescreen.store import ChunkError, StoreError, open_dataset, read_block
from widescreen.store._format import ATTRS_KEY

from .conftest import write_store


def _dosages(rng, n=30, p=32):
    X = rng.integers(0, 3, size=(n, p)).astype(np.int8)
    X[rng.random((n, p)) < 0.05] = -128
    return X


@pytest.fixture
def store(tmp_path, rng):
    X = _dosages(rng)
    return write_store(tmp_path / "s.zarr", X, chunk_features=8), X


def _chunk(ds, c: int):
    return ds.path / "X" / "c" / "0" / str(c)


def _flip(path, at: int | None = None, n: int = 16) -> None:
    data = bytearray(path.read_bytes())
    at = len(data) // 2 if at is None else at
    for i in range(at, at + n):
        data[i] ^= 0xFF
    path.write_bytes(bytes(data))


def _attrs(path, **changes) -> None:
    meta = json.loads((path / "zarr.json").read_text())
    meta["attributes"][ATTRS_KEY].update(changes)
    (path / "zarr.json").write_text(json.dumps(meta))


def test_new_stores_carry_crc32c_checksums(store):
    ds, X = store
    assert ds.attrs.format_version == 2 and ds.attrs.checksums == "crc32c"
    assert ds.checksummed and ds.notes == ()
    # the codec's last four bytes are the CRC-32C of the rest of the chunk file, as the zarr v3
    # crc32c codec specifies (Castagnoli polynomial; computed here with google-crc32c directly)
    data = _chunk(ds, 1).read_bytes()
    crc = int.from_bytes(data[-4:], "little")
    assert crc == google_crc32c.value(data[:-4])
    assert ds.checksum_table()[0, 1] == crc
    # any Zarr v3 reader decodes the store
    np.testing.assert_array_equal(zarr.open_array(ds.path / "X", mode="r")[:], X)


@pytest.mark.parametrize("slow", [False, True])
def test_flipped_bytes_inside_a_chunk_are_caught(store, slow):
    import dataclasses

    from widescreen.store import ChunkLayout

    ds, _X = store
    _flip(_chunk(ds, 2))
    layout = ChunkLayout.of(ds)
    if slow:
        layout = dataclasses.replace(layout, fast=False)
    with pytest.raises(ChunkError, match=r"chunk (0/|column )2 of .*X \(features 16\.\.23\)"):
        read_block(ds, 2, layout)
    np.testing.assert_array_equal(read_block(ds, 1, layout)[:, :2], _X[:, 8:10])


def test_swapped_chunks_are_caught_by_the_reader_and_the_fingerprint(store):
    ds, _X = store
    a, b = _chunk(ds, 0), _chunk(ds, 3)
    da, db = a.read_bytes(), b.read_bytes()
    a.write_bytes(db)
    b.write_bytes(da)
    with pytest.raises(ChunkError, match="holds the data of chunk 0/3"):
        read_block(ds, 0)
    with pytest.raises(ChunkError, match="holds the data recorded for chunk 0/3"):
        ds.fingerprint()


def test_fingerprint_sees_content_changed_with_same_size_and_mtime(store):
    ds, _X = store
    before = ds.fingerprint()
    f = _chunk(ds, 1)
    st = os.stat(f)
    # another writer changes a value, re-encodes the chunk and records its new checksum, and the
    # file keeps its modification time
    block = zarr.open_array(ds.path / "X", mode="r")[:, 8:16].copy()
    block[0, 0] = 2 if block[0, 0] != 2 else 1
    zarr.open_array(ds.path / "X", mode="r+")[:, 8:16] = block
    new = f.read_bytes()
    os.utime(f, ns=(st.st_atime_ns, st.st_mtime_ns))
    table = zarr.open_array(ds.path / "checksums" / "X", mode="r+")
    t = table[:]
    t[0, 1] = int.from_bytes(new[-4:], "little")
    table[:] = t
    after = open_dataset(ds.path).fingerprint()
    assert after != before
    # and reading only a few bytes per chunk: the census opens every chunk file once
    assert len(ds.check_chunks()) == 4 + 1 + 1 + 1  # X, samples/id, features/id, checksums/X


def test_out_of_range_dosages_are_damage_named_with_the_chunk(tmp_path, rng):
    X = _dosages(rng)
    X[7, 13] = 3
    X[9, 14] = -127
    ds = write_store(tmp_path / "bad.zarr", X, chunk_features=8)
    with pytest.raises(
        ChunkError, match=r"chunk 0/1 of .*\(features 8\.\.15\): 2 value\(s\).*first 3 at sample 7"
    ):
        read_block(ds, 1)
    np.testing.assert_array_equal(read_block(ds, 0), X[:, :8])


def _version_1_store(path, X, ids=None, creator="widescreen 0.1"):
    """A store as format version 1 wrote it: X with Blosc only, no checksum table."""
    n, p = X.shape
    g = zarr.open_group(path, mode="w")
    g.attrs[ATTRS_KEY] = {
        "format_version": 1,
        "value_kind": "dosage",
        "dtype": "int8",
        "n_samples": n,
        "n_features": p,
        "missing_sentinel": -128,
        "creator": creator,
        "complete": True,
        "source": "",
    }
    x = g.create_array(
        "X",
        shape=(n, p),
        chunks=(n, 8),
        dtype="int8",
        fill_value=-128,
        compressors=BloscCodec(cname="lz4", clevel=5, shuffle="bitshuffle", typesize=1),
    )
    x[:] = X
    g.create_array("samples/id", shape=(n,), dtype=str)[:] = np.array([f"s{i}" for i in range(n)])
    fid = ids if ids is not None else np.array([f"f{j}" for j in range(p)])
    g.create_array("features/id", shape=(p,), dtype=str)[:] = fid
    return path


def test_version_1_stores_open_with_a_note_and_range_checks(tmp_path, rng):
    X = _dosages(rng)
    path = _version_1_store(tmp_path / "v1.zarr", X)
    ds = open_dataset(path)
    assert not ds.checksummed
    assert "without chunk checksums" in ds.notes[0]
    np.testing.assert_array_equal(read_block(ds, 2), X[:, 16:24])
    assert isinstance(ds.fingerprint(), str)
    # bit rot that still decodes: caught only when it gives impossible dosages
    X2 = X.copy()
    X2[:, 16:24] = 7
    zarr.open_array(path / "X", mode="r+")[:, 16:24] = X2[:, 16:24]
    with pytest.raises(ChunkError, match="not dosages"):
        read_block(open_dataset(path), 2)


def test_missing_id_chunks_are_named_by_node(tmp_path, rng):
    X = _dosages(rng)
    ds = write_store(tmp_path / "s.zarr", X, chunk_features=8)
    shutil.rmtree(ds.path / "features" / "id" / "c")
    with pytest.raises(StoreError, match=r"missing chunk 0 of .*features/id"):
        ds.fingerprint()
    with pytest.raises(StoreError, match=r"features/id: empty feature id at position 1"):
        ds.feature_ids_at([0, 5])
    ds = write_store(tmp_path / "t.zarr", X, chunk_features=8)
    shutil.rmtree(ds.path / "samples" / "id" / "c")
    # the sample ids are checked when the store opens: the store is blamed, not the outcome table
    with pytest.raises(StoreError, match=r"t\.zarr/samples/id: empty sample id at position 1"):
        open_dataset(ds.path)


def test_damaged_id_chunk_is_named(tmp_path, rng):
    ds = write_store(tmp_path / "s.zarr", _dosages(rng), chunk_features=8)
    _flip(ds.path / "samples" / "id" / "c" / "0", at=2, n=2)
    with pytest.raises(StoreError, match=r"s\.zarr/samples/id: cannot be read .*checksum"):
        open_dataset(ds.path)


@pytest.mark.parametrize(
    ("bad", "says"), [("f\t1", "a tab"), ("f\n1", "a newline"), ("f\r1", "a carriage return")]
)
def test_ids_of_a_store_written_elsewhere_are_validated(tmp_path, rng, bad, says):
    X = _dosages(rng)
    ids = np.array([f"f{j}" for j in range(X.shape[1])], dtype=object)
    ids[5] = bad
    path = _version_1_store(tmp_path / "o.zarr", X, ids=ids.astype(str), creator="another writer")
    with pytest.raises(
        StoreError, match=rf"o\.zarr/features/id: feature id .* at position 6 holds {says}"
    ):
        open_dataset(path)


def test_ids_with_a_tab_are_refused_when_writing(tmp_path, rng):
    with pytest.raises(StoreError, match="feature id 'a\\\\tb' at position 2 holds a tab"):
        write_store(tmp_path / "s.zarr", _dosages(rng, p=3), feature_ids=["x", "a\tb", "y"])


@pytest.mark.parametrize(
    ("change", "says"),
    [
        ({"value_kind": "continuous"}, r"zarr\.json: a continuous store holds float32 or float64"),
        (
            {"dtype": "float32", "value_kind": "continuous"},
            r"X: stored as int8, but the attributes say float32",
        ),
        ({"value_kind": "counts"}, r"value_kind 'counts' is not one of"),
        ({"missing_sentinel": None}, r"missing_sentinel None does not fit a int8 store"),
        ({"format_version": 7}, r"format version 7; this widescreen reads versions 1, 2"),
    ],
)
def test_edited_attributes_are_refused_naming_the_node(store, change, says):
    ds, _X = store
    _attrs(ds.path, **change)
    with pytest.raises(StoreError, match=says):
        open_dataset(ds.path)


def test_x_of_another_dtype_is_refused(tmp_path, rng):
    X = _dosages(rng)
    path = _version_1_store(tmp_path / "u.zarr", X)
    g = zarr.open_group(path, mode="r+")
    del g["X"]
    g.create_array("X", shape=X.shape, chunks=(X.shape[0], 8), dtype="uint8")[:] = X.view(np.uint8)
    with pytest.raises(
        StoreError, match=r"u\.zarr/X: stored as uint8, but the attributes say int8"
    ):
        open_dataset(path)
