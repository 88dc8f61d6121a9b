"""Feature ids and annotations streamed to the store chunk by chunk, checked without holding them.

References: the written arrays are compared with zarr writing the same values in one piece (zarr's own
array writer), duplicates with a plain Python dictionary of first positions, the ranking with a store
whose ids sit in one chunk.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import zarr

import widescreen.store._ids as ids_mod
from widescreen.store import DatasetWriter, FeatureIdError, IngestError, import_table
from widescreen.store._format import _CHECKED_NUMBERS, _CHECKED_STRINGS
from widescreen.store._ids import DuplicateFinder, hash_ids

from .conftest import write_outcome


def _blocks(p, width):
    return [(a, min(a + width, p)) for a in range(0, p, width)]


def test_writer_streams_ids_chunk_by_chunk(tmp_path):
    n, p, width, chunk = 5, 1000, 37, 100
    fid = np.array([f"feat{j}" for j in range(p)])
    chrom = np.array([str(1 + j // 300) for j in range(p)])
    pos = np.arange(p, dtype=np.int64) * 10
    x = np.random.default_rng(0).integers(0, 3, (n, p), dtype=np.int8)
    w = DatasetWriter(
        tmp_path / "s.zarr",
        [f"s{i}" for i in range(n)],
        "dosage",
        "int8",
        annotations=True,
        id_chunk=chunk,
        chunks=(n, 64),
    )
    for a, b in _blocks(p, width):
        w.append(x[:, a:b], fid[a:b], chrom[a:b], pos[a:b])
        # Never more than a chunk plus a block of ids in memory; whole chunks are on disk already.
        assert w._ids.n_held < chunk + width
        assert w._ids.n_written == (b // chunk) * chunk
        assert (tmp_path / "s.zarr/features/id/c/0").is_file() == (b >= chunk)
    ds = w.finalize()
    assert not (tmp_path / "s.zarr/.id-check").exists()
    np.testing.assert_array_equal(ds.feature_ids(), fid)
    np.testing.assert_array_equal(ds.annotations()["chrom"], chrom)
    np.testing.assert_array_equal(ds.annotations()["pos"], pos)
    # The same bytes as zarr writing each array at once with the same chunks and codecs.
    ref = zarr.open_group(tmp_path / "ref.zarr", mode="w")
    for name, vals, dtype, comp in [
        ("id", fid, str, _CHECKED_STRINGS),
        ("chrom", chrom, str, _CHECKED_STRINGS),
        ("pos", pos, "int64", _CHECKED_NUMBERS),
    ]:
        arr = ref.create_array(name, shape=(p,), dtype=dtype, chunks=(chunk,), compressors=comp)
        arr[:] = vals
        for c in range(p // chunk):
            got = (tmp_path / f"s.zarr/features/{name}/c/{c}").read_bytes()
            assert got == (tmp_path / f"ref.zarr/{name}/c/{c}").read_bytes(), (name, c)
    idx = np.array([999, 0, 512, 100, 99, 513])
    np.testing.assert_array_equal(ds.feature_ids_at(idx), fid[idx])
    np.testing.assert_array_equal(ds.annotations_at(idx)["chrom"], chrom[idx])
    np.testing.assert_array_equal(ds.annotations_at(idx)["pos"], pos[idx])


def test_small_store_keeps_one_id_chunk(tmp_path):
    # Fewer ids than a chunk: one chunk of exactly p ids, the layout written before streaming.
    w = DatasetWriter(tmp_path / "s.zarr", ["a", "b"], "dosage", "int8", id_chunk=100)
    w.append(np.zeros((2, 30), np.int8), [f"f{j}" for j in range(30)])
    ds = w.finalize()
    assert ds.group["features/id"].chunks == (30,)


def _first_duplicate(ids):
    """Reference: the duplicated id whose second occurrence comes first (a dictionary)."""
    seen = {}
    for j, v in enumerate(ids):
        if v in seen:
            return v, seen[v], j
        seen[v] = j
    return None


@pytest.mark.parametrize("spill", [10**9, 50])
@pytest.mark.parametrize("collide", [False, True])
def test_duplicates_found_from_hashes(tmp_path, monkeypatch, spill, collide):
    rng = np.random.default_rng(3)
    ids = np.array([f"id{k}" for k in rng.permutation(5000)[:700]])
    ids[[400, 650]] = ids[[120, 30]]  # two duplicates; the one at 400 comes first
    if collide:
        # Every id hashes to one of three values: only the ids themselves tell duplicates apart.
        monkeypatch.setattr(ids_mod, "hash_ids", lambda a: np.char.str_len(a).astype(np.uint64) % 3)
    f = DuplicateFinder(tmp_path / "dups", spill=spill)
    for a, b in _blocks(ids.size, 64):
        f.add(ids[a:b])
    assert f.find(lambda at: ids[at]) == _first_duplicate(list(ids)) == (ids[120], 120, 400)
    f.close()
    assert not (tmp_path / "dups").exists()
    unique = np.array([f"u{k}" for k in range(700)])
    g = DuplicateFinder(tmp_path / "dups2", spill=spill)
    g.add(unique)
    assert g.find(lambda at: unique[at]) is None


def test_hash_ignores_string_width():
    a = np.array(["x1", "abc"])
    b = np.array(["x1", "abc", "a much longer id"])
    np.testing.assert_array_equal(hash_ids(a), hash_ids(b)[:2])
    assert len(set(hash_ids(b).tolist())) == 3


def test_writer_refuses_duplicate_after_streaming(tmp_path, monkeypatch):
    monkeypatch.setattr(ids_mod, "SPILL_RECORDS", 40)
    w = DatasetWriter(tmp_path / "s.zarr", ["a", "b"], "dosage", "int8", id_chunk=50)
    fid = [f"f{j}" for j in range(300)]
    fid[250] = "f7"
    for a, b in _blocks(300, 33):
        w.append(np.zeros((2, b - a), np.int8), fid[a:b])
    with pytest.raises(FeatureIdError, match="duplicate feature id 'f7' at positions 8 and 251"):
        w.finalize()


def test_text_import_names_lines_of_a_streamed_duplicate(tmp_path, monkeypatch):
    # Features as rows, ids spread over several id chunks and spilled hash buckets.
    monkeypatch.setattr(ids_mod, "ID_CHUNK", 16)
    monkeypatch.setattr(ids_mod, "SPILL_RECORDS", 20)
    rows = [f"g{j},1,0,2" for j in range(120)]
    rows[97] = "g11,0,0,1"
    src = tmp_path / "x.csv"
    src.write_text("id,s1,s2,s3\n" + "\n".join(rows) + "\n")
    with pytest.raises(IngestError, match=r"duplicate feature id 'g11' at line 13 and line 99"):
        import_table(src, tmp_path / "x.zarr", features_as_rows=True, value_kind="dosage")
    rows[97] = "g97,0,0,1"
    src.write_text("id,s1,s2,s3\n" + "\n".join(rows) + "\n")
    ds = import_table(src, tmp_path / "x.zarr", features_as_rows=True, value_kind="dosage")
    assert ds.group["features/id"].chunks == (16,)
    np.testing.assert_array_equal(ds.feature_ids(), [f"g{j}" for j in range(120)])


def test_ranking_ids_read_by_coordinate(tmp_path, monkeypatch):
    """A screen on a store whose ids span many chunks writes the same tables as with one chunk."""
    from widescreen.workflow import ScreenConfig, screen

    rng = np.random.default_rng(5)
    n, p = 60, 400
    x = rng.integers(0, 3, (n, p), dtype=np.int8)
    y = x[:, [7, 133, 301]].sum(axis=1) + rng.standard_normal(n)
    sid = [f"s{i}" for i in range(n)]
    write_outcome(tmp_path / "y.tsv", sid, {"y": y})
    fid = [f"rs{(j * 7919) % 10007}" for j in range(p)]
    tables = []
    for chunk in (None, 16):
        store = tmp_path / f"s{chunk}.zarr"
        w = DatasetWriter(store, sid, "dosage", "int8", chunks=(n, 64), id_chunk=chunk)
        for a, b in _blocks(p, 50):
            w.append(x[:, a:b], fid[a:b])
        w.finalize()
        out = tmp_path / f"run{chunk}"
        screen(store, tmp_path / "y.tsv", ScreenConfig(response="y", shortlist=25), out)
        tables.append((out / "ranking.tsv").read_text())
    assert tables[0] == tables[1]
    assert "rs" in tables[0]
    # lambda_GC from exact order statistics over blocks: median(chi2.isf(p, 1)) / chi2.ppf(0.5, 1)
    # computed whole with scipy (common practice).
    from scipy import stats

    from widescreen.engine import RunFolder, read_stats

    pv = read_stats(RunFolder(out), "screen")["p_value"]
    want = np.median(stats.chi2.isf(pv[np.isfinite(pv)], 1)) / stats.chi2.ppf(0.5, 1)
    got = json.loads((out / "manifest.json").read_text())["lambda_gc"]["screen"]
    assert got == pytest.approx(want, abs=1e-6)


def test_npy_feature_ids_file_streamed(tmp_path, monkeypatch):
    from widescreen.store import import_npy

    monkeypatch.setattr(ids_mod, "ID_CHUNK", 4)
    x = np.random.default_rng(1).integers(0, 3, (3, 10), dtype=np.int8)
    np.save(tmp_path / "x.npy", x)
    names = [f"v{j}" for j in range(10)]
    (tmp_path / "ids.txt").write_text("\n".join(names) + "\n")
    ds = import_npy(tmp_path / "x.npy", tmp_path / "a.zarr", feature_ids=tmp_path / "ids.txt")
    np.testing.assert_array_equal(ds.feature_ids(), names)
    names[8] = "v1"
    (tmp_path / "ids.txt").write_text("\n".join(names))  # no newline at the end
    with pytest.raises(
        IngestError, match=r"ids\.txt: duplicate feature id 'v1' at line 2 and line 9"
    ):
        import_npy(tmp_path / "x.npy", tmp_path / "b.zarr", feature_ids=tmp_path / "ids.txt")
    (tmp_path / "ids.txt").write_text("\n".join(names[:9]) + "\n")
    with pytest.raises(IngestError, match=r"ids\.txt: 9 feature ids for 10 features"):
        import_npy(tmp_path / "x.npy", tmp_path / "c.zarr", feature_ids=tmp_path / "ids.txt")
    # Default ids f1..fp made block by block.
    ds = import_npy(tmp_path / "x.npy", tmp_path / "d.zarr", chunk_features=3)
    np.testing.assert_array_equal(ds.feature_ids(), [f"f{j}" for j in range(1, 11)])


def test_ids_of_a_store_written_elsewhere_checked_chunk_by_chunk(tmp_path, monkeypatch):
    from widescreen.store import StoreError, open_dataset

    monkeypatch.setattr(ids_mod, "SPILL_RECORDS", 3)
    w = DatasetWriter(tmp_path / "o.zarr", ["a", "b"], "dosage", "int8", id_chunk=4)
    w.append(np.zeros((2, 10), np.int8), [f"f{j}" for j in range(10)])
    w.finalize()
    g = zarr.open_group(tmp_path / "o.zarr", mode="r+")
    attrs = dict(g.attrs["widescreen"])
    g.attrs["widescreen"] = {**attrs, "creator": "another writer"}
    assert open_dataset(tmp_path / "o.zarr").n_features == 10
    g["features/id"][8] = "f1"  # a duplicate two id chunks away from its first occurrence
    with pytest.raises(
        StoreError, match=r"features/id: duplicate feature id 'f1' at positions 2 and 9"
    ):
        open_dataset(tmp_path / "o.zarr")
