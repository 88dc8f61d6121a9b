"""CSV / TSV import: round trips against numpy's and the csv module's own readers, and bad input."""

from __future__ import annotations

import csv
import gzip
import io

import numpy as np
import pytest

import widescreen.store._ingest_fields as fields
import widescreen.store._ingest_text as ingest
from widescreen.store import StoreError, open_dataset
from widescreen.store._ingest_text import IngestError, import_table

MISSING = {"", "NA", "NaN", "nan", "."}


def write_table(path, X, *, delim=",", missing="", transpose=False, label="id", fmt=repr):
    """Write X (n, p) as text: header of feature ids, one row per sample (or transposed)."""
    n, p = X.shape
    rows, cols = (
        ([f"s{i}" for i in range(n)], [f"f{j}" for j in range(p)])
        if not transpose
        else ([f"f{j}" for j in range(p)], [f"s{i}" for i in range(n)])
    )
    M = X.T if transpose else X
    out = io.StringIO()
    out.write(delim.join([label, *cols]) + "\n")
    for r, row in zip(rows, M, strict=True):
        cells = [missing if np.isnan(v) else fmt(float(v)) for v in row]
        out.write(delim.join([r, *cells]) + "\n")
    text = out.getvalue()
    if str(path).endswith(".gz"):
        with gzip.open(path, "wt") as fh:
            fh.write(text)
    else:
        path.write_text(text)
    return path


def read_reference(path, delim):
    """Reference reader: Python's csv module, missing tokens -> NaN, float() per cell."""
    opener = gzip.open if str(path).endswith(".gz") else open
    with opener(path, "rt", newline="") as fh:
        rows = list(csv.reader(fh, delimiter=delim))
    header, body = rows[0], rows[1:]
    ids = [r[0] for r in body]
    vals = np.array([[np.nan if c in MISSING else float(c) for c in r[1:]] for r in body])
    return header[1:], ids, vals


def assert_no_store(path):
    """After a failed import the path is absent or refused by open_dataset."""
    if path.exists():
        with pytest.raises(StoreError):
            open_dataset(path)


@pytest.fixture
def matrix(rng):
    X = rng.standard_normal((23, 75)).astype(np.float32)
    X[rng.random(X.shape) < 0.07] = np.nan
    return X


@pytest.mark.parametrize("batch", [None, 37, 5])
def test_csv_round_trip_matches_csv_module(tmp_path, matrix, monkeypatch, batch):
    if batch:  # tiny batches cut lines mid-row and even mid-field
        monkeypatch.setattr(fields, "BATCH_BYTES", batch)
    src = write_table(tmp_path / "x.csv", matrix)
    ds = import_table(src, tmp_path / "s", chunk_features=16)
    fids, sids, ref = read_reference(src, ",")  # reference: csv module + float()
    np.testing.assert_array_equal(ds.X[:], ref.astype(np.float32))
    assert list(ds.sample_ids()) == sids
    assert list(ds.feature_ids()) == fids
    assert ds.dtype == np.float32 and ds.chunks == (23, 16)
    assert ds.attrs.source == str(src)


def test_tsv_gzip_float64_matches_loadtxt(tmp_path, rng):
    X = rng.standard_normal((11, 40)) * 10.0 ** rng.integers(-8, 8, (11, 40))
    src = write_table(tmp_path / "x.tsv.gz", X, delim="\t")
    ds = import_table(src, tmp_path / "s", dtype="float64")
    # reference: numpy's own text reader
    ref = np.loadtxt(src, delimiter="\t", skiprows=1, usecols=range(1, 41))
    np.testing.assert_array_equal(ds.X[:], ref)
    np.testing.assert_array_equal(ds.X[:], X)  # repr() round-trips a float64 exactly


def test_transposed_file(tmp_path, matrix, monkeypatch):
    monkeypatch.setattr(fields, "BATCH_BYTES", 300)
    src = write_table(tmp_path / "x.txt", matrix, delim="\t", missing="NA", transpose=True)
    ds = import_table(src, tmp_path / "s", features_as_rows=True, chunk_features=7)
    _, fids, ref = read_reference(src, "\t")  # rows of the file are features
    np.testing.assert_array_equal(ds.X[:], ref.T.astype(np.float32))
    assert list(ds.feature_ids()) == fids
    assert list(ds.sample_ids()) == [f"s{i}" for i in range(23)]


def test_second_pass_in_narrow_column_groups(tmp_path, matrix, monkeypatch):
    # A budget of a few columns forces many groups read back from the temporary file.
    monkeypatch.setattr(ingest, "MEMORY_BUDGET", 23 * 4 * 10)
    src = write_table(tmp_path / "x.csv", matrix)
    ds = import_table(src, tmp_path / "s", chunk_features=4)
    np.testing.assert_array_equal(ds.X[:], matrix)


@pytest.mark.parametrize("token", sorted(MISSING))
def test_missing_tokens(tmp_path, token):
    src = tmp_path / "x.csv"
    src.write_text(f"id,a,b\nr1,{token},1.5\nr2,2,{token}\n")
    ds = import_table(src, tmp_path / "s")
    np.testing.assert_array_equal(ds.X[:], np.array([[np.nan, 1.5], [2.0, np.nan]], np.float32))


def test_dosage_text(tmp_path):
    src = tmp_path / "g.csv"
    src.write_text("sample,v1,v2,v3\na,0,1,2\nb,NA,2,0\nc,1,,2.0\n")
    ds = import_table(src, tmp_path / "s", value_kind="dosage")
    assert ds.dtype == np.int8 and ds.attrs.value_kind == "dosage"
    expected = np.array([[0, 1, 2], [-128, 2, 0], [1, -128, 2]], np.int8)  # written out by hand
    np.testing.assert_array_equal(ds.X[:], expected)


def test_quotes_crlf_bom_and_blank_lines(tmp_path):
    src = tmp_path / "x.csv"
    src.write_bytes(b'\xef\xbb\xbf"id","g1",g2\r\n"s 1",1,2\r\n\r\ns2,3,4\r\n\n')
    ds = import_table(src, tmp_path / "s")
    assert list(ds.feature_ids()) == ["g1", "g2"]
    assert list(ds.sample_ids()) == ["s 1", "s2"]
    np.testing.assert_array_equal(ds.X[:], [[1, 2], [3, 4]])


def test_unicode_ids(tmp_path):
    src = tmp_path / "x.csv"
    src.write_text("id,gène,größe\nÅsa,1,2\n", encoding="utf-8")
    ds = import_table(src, tmp_path / "s")
    assert list(ds.feature_ids()) == ["gène", "größe"]
    assert list(ds.sample_ids()) == ["Åsa"]


def test_progress_reaches_total(tmp_path, matrix, monkeypatch):
    monkeypatch.setattr(fields, "BATCH_BYTES", 500)
    src = write_table(tmp_path / "x.csv", matrix)
    calls = []
    import_table(src, tmp_path / "s", progress=lambda d, t: calls.append((d, t)))
    done = [d for d, _ in calls]
    assert len(calls) > 3 and done == sorted(done)
    assert calls[-1][0] == calls[-1][1]


# --- errors: each names the file, the line (header = 1) and the column with its ids ----------


def _fails(tmp_path, text, match, name="x.csv", **kw):
    src = tmp_path / name
    src.write_text(text)
    with pytest.raises(IngestError, match=match) as err:
        import_table(src, tmp_path / "s", **kw)
    assert str(src) in str(err.value)
    assert_no_store(tmp_path / "s")
    return str(err.value)


def test_too_few_fields(tmp_path):
    msg = _fails(tmp_path, "id,a,b,c\nr1,1,2,3\nr2,1,2\n", "line 3 has 3 fields")
    assert "column 4 (feature 'c') is missing" in msg


def test_too_many_fields(tmp_path):
    _fails(tmp_path, "id,a,b\nr1,1,2\nr2,1,2,3\n", "line 3 has more than 3 fields")


def test_non_numeric_cell(tmp_path):
    msg = _fails(tmp_path, "id,a,b\nr1,1,2\nr2,1,x7y\n", "line 3 \\(sample 'r2'\\), column 3")
    assert "(feature 'b')" in msg and "'x7y' is not a number" in msg


def test_non_numeric_cell_transposed(tmp_path):
    msg = _fails(
        tmp_path,
        "id,s1,s2\nf1,1,2\nf2,oops,2\n",
        "line 3 \\(feature 'f2'\\), column 2 \\(sample 's1'\\)",
        features_as_rows=True,
    )
    assert "'oops'" in msg


def test_bad_cell_after_a_long_line_cut(tmp_path, monkeypatch):
    monkeypatch.setattr(fields, "BATCH_BYTES", 8)  # the sample id is in an earlier batch
    _fails(
        tmp_path, "id,a,b,c,d\nr1,1,2,3,4\nrow2,1,2,3,?\n", "line 3 \\(sample 'row2'\\), column 5"
    )


def test_bad_dosage(tmp_path):
    msg = _fails(
        tmp_path, "id,a,b\nr1,0,3\n", "line 2 \\(sample 'r1'\\), column 3", value_kind="dosage"
    )
    assert "'3' is not a dosage" in msg


def test_duplicate_sample_ids(tmp_path):
    _fails(tmp_path, "id,a\nr1,1\nr2,2\nr1,3\n", "duplicate sample id 'r1' at line 2 and line 4")


def test_duplicate_feature_ids(tmp_path):
    _fails(
        tmp_path,
        "id,a,b,a\nr1,1,2,3\n",
        "duplicate feature id 'a' at line 1, column 2 and line 1, column 4",
    )


def test_duplicate_feature_rows(tmp_path):
    _fails(
        tmp_path,
        "id,s1\nf1,1\nf2,2\nf1,3\n",
        "duplicate feature id 'f1' at line 2 and line 4",
        features_as_rows=True,
    )


def test_empty_ids(tmp_path):
    _fails(tmp_path, "id,a,\nr1,1,2\n", "line 1, column 3: empty feature id")
    _fails(tmp_path, "id,a\n,1\n", "line 2, column 1: empty sample id")


def test_empty_and_header_only_files(tmp_path):
    _fails(tmp_path, "", "empty file")
    _fails(tmp_path, "id,a,b\n", "a header but no data rows")
    _fails(tmp_path, "id;a;b\nr;1;2\n", "line 1 has a single field")


def test_unknown_extension(tmp_path):
    src = tmp_path / "x.dat"
    src.write_text("id,a\nr,1\n")
    with pytest.raises(IngestError, match=r"unknown extension '\.dat'; known are \.csv"):
        import_table(src, tmp_path / "s")
    ds = import_table(src, tmp_path / "s", delimiter=",")  # an explicit delimiter is enough
    assert ds.shape == (1, 1)


def test_existing_store_refused_then_overwritten(tmp_path):
    src = tmp_path / "x.csv"
    src.write_text("id,a\nr,1\n")
    import_table(src, tmp_path / "s")
    with pytest.raises(StoreError, match="already exists"):
        import_table(src, tmp_path / "s")
    src.write_text("id,a,b\nr,1,2\n")
    assert import_table(src, tmp_path / "s", overwrite=True).shape == (1, 2)


def test_failure_after_chunks_were_written_leaves_no_store(tmp_path, matrix, monkeypatch):
    monkeypatch.setattr(fields, "BATCH_BYTES", 200)
    src = write_table(tmp_path / "x.csv", matrix, transpose=True)
    with open(src, "a") as fh:
        fh.write("f_last," + ",".join(["1"] * 22) + ",bad\n")
    with pytest.raises(IngestError, match="'bad' is not a number"):
        import_table(src, tmp_path / "s", features_as_rows=True, chunk_features=4)
    assert_no_store(tmp_path / "s")


def test_number_forms_match_python_float(tmp_path, rng):
    x = rng.standard_normal(300) * 10.0 ** rng.integers(-12, 12, 300)
    tokens = (
        [repr(float(v)) for v in x] + [f"{v:.4f}" for v in x[:50]] + [f"{v:.15g}" for v in x[:50]]
    )
    tokens += ["-0", "+.5", "5.", "007", "-1e3", "1E-2", "inf", "-Infinity", " 3.5", "1_000"]
    tokens += ["123456789012345", "1234567890123456", "0.000000000000001", "9007199254740993"]
    src = tmp_path / "x.csv"
    src.write_text(
        "id," + ",".join(f"c{j}" for j in range(len(tokens))) + "\nr," + ",".join(tokens) + "\n"
    )
    # infinite values are refused unless asked to be read as missing
    with pytest.raises(
        IngestError, match=r"column 4\d\d \(feature 'c\d+'\): 'inf' is not a finite"
    ):
        import_table(src, tmp_path / "s", dtype="float64")
    ds = import_table(src, tmp_path / "s", dtype="float64", nonfinite="missing")
    # reference: Python's float() (correctly rounded decimal -> binary conversion); inf -> missing
    want = [float(t) for t in tokens]
    np.testing.assert_array_equal(ds.X[0], [v if np.isfinite(v) else np.nan for v in want])
    assert np.signbit(ds.X[0, tokens.index("-0")])


def test_damaged_or_failing_gzip(tmp_path, matrix, monkeypatch):
    monkeypatch.setattr(fields, "BATCH_BYTES", 256)  # many batches queued by the reader thread
    src = write_table(tmp_path / "x.csv.gz", matrix)
    data = src.read_bytes()
    src.write_bytes(data[: len(data) // 2])  # truncated stream
    with pytest.raises(IngestError, match="cannot decompress"):
        import_table(src, tmp_path / "s")
    assert_no_store(tmp_path / "s")
    bad = matrix.copy()
    bad[1, 2] = np.inf  # written as 'inf', then replaced below by text that is not a number
    text = gzip.decompress(write_table(tmp_path / "y.csv.gz", bad).read_bytes()).replace(
        b"inf", b"1x"
    )
    (tmp_path / "y.csv.gz").write_bytes(gzip.compress(text))
    with pytest.raises(IngestError, match=r"line 3 \(sample 's1'\), column 4 \(feature 'f2'\)"):
        import_table(tmp_path / "y.csv.gz", tmp_path / "s")


def test_very_long_id_among_many(tmp_path):
    fids = [f"f{j}" for j in range(999)] + ["L" * 3000]  # too wide for one byte matrix
    src = tmp_path / "x.csv"
    src.write_text("id," + ",".join(fids) + "\nr," + ",".join(["1"] * 1000) + "\n")
    ds = import_table(src, tmp_path / "s")
    assert list(ds.feature_ids()) == fids
