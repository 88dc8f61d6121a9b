"""Malformed input, table-driven: CSV/TSV, VCF and .npy imports, damaged stores and outcome tables.

Every case runs the command line in-process and asserts the exit code, one line on stderr that names
the file with its line and column (or the store's node), and that nothing complete-looking was left: no
store that opens after a failed import, no ranking.tsv after a failed screen.
"""

from __future__ import annotations

import gzip
import json
import re
import shutil
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
import zarr
from typer.testing import CliRunner

from widescreen.cli import app
from widescreen.store import StoreError, open_dataset

from .conftest import write_outcome, write_store

runner = CliRunner()
N, P = 30, 32  # the damaged-store cases: 4 chunks of 8 features


@dataclass(frozen=True)
class Case:
    name: str
    make: Callable[[Path], list[str]]  # writes the input files, returns the command's arguments
    says: str  # regex the one-line message must match (it names file/line/column or node)
    code: int = 1


# ------------------------------------------------------------------------------------------------
# builders


def _text(name: str, body: str | bytes, *, dosage=False, extra=()):
    def make(d: Path) -> list[str]:
        src = d / name
        data = body.encode() if isinstance(body, str) else body
        if name.endswith(".gz"):
            data = gzip.compress(data)
        src.write_bytes(data)
        return (
            ["import", str(src), str(d / "s.zarr"), "--quiet"]
            + (["--dosage"] if dosage else [])
            + list(extra)
        )

    return make


def _truncated_gz(name: str, body: str):
    def make(d: Path) -> list[str]:
        data = gzip.compress(body.encode() * 50)
        (d / name).write_bytes(data[: len(data) // 2])
        return ["import", str(d / name), str(d / "s.zarr"), "--quiet"]

    return make


CSV_OK = "id,a,b\ns1,1,2\ns2,0,1\ns3,2,0\n"


def _csv(body, **kw):
    return _text("x.csv", body, **kw)


def _vcf_text(samples=("a", "b"), lines=(), header=None) -> str:
    head = (
        header
        if header is not None
        else "\t".join(
            ["#CHROM", "POS", "ID", "REF", "ALT", "QUAL", "FILTER", "INFO", "FORMAT", *samples]
        )
    )
    return "##fileformat=VCFv4.2\n" + head + "\n" + "".join(line + "\n" for line in lines)


def _site(chrom="1", pos="100", vid="rs1", ref="A", alt="G", fmt="GT", calls=("0/1", "1/1")) -> str:
    return "\t".join([chrom, pos, vid, ref, alt, ".", "PASS", ".", fmt, *calls])


def _vcf(body: str | bytes, name="x.vcf"):
    return _text(name, body)


def _npy(array_or_bytes, *extra):
    def make(d: Path) -> list[str]:
        src = d / "x.npy"
        if isinstance(array_or_bytes, bytes):
            src.write_bytes(array_or_bytes)
        else:
            np.save(src, array_or_bytes, allow_pickle=True)
        return ["import", str(src), str(d / "s.zarr"), "--quiet", *extra]

    return make


def _npy_truncated(d: Path) -> list[str]:
    np.save(d / "x.npy", np.zeros((20, 20), np.float32))
    data = (d / "x.npy").read_bytes()
    (d / "x.npy").write_bytes(data[:300])
    return ["import", str(d / "x.npy"), str(d / "s.zarr"), "--quiet"]


def _existing(complete: bool):
    def make(d: Path) -> list[str]:
        (d / "x.csv").write_text(CSV_OK)
        if complete:
            runner.invoke(app, ["import", str(d / "x.csv"), str(d / "s.zarr"), "--quiet"])
        else:
            from widescreen.store import DatasetWriter

            w = DatasetWriter(d / "s.zarr", ["a", "b"], "continuous", "float32", n_features=1)
            w.append(np.zeros((2, 1), np.float32), ["f"])  # never finalised: a killed import
        return ["import", str(d / "x.csv"), str(d / "s.zarr"), "--quiet"]

    return make


# the damaged-store cases: a good store and outcome table, damaged by `how`, then screened


def _store(d: Path) -> tuple[Path, Path]:
    rng = np.random.default_rng(3)
    X = rng.integers(0, 3, (N, P)).astype(np.int8)
    ids = [f"s{i}" for i in range(N)]
    ds = write_store(d / "x.zarr", X, chunk_features=8, sample_ids=ids)
    y = X[:, 5] + rng.standard_normal(N)
    out = write_outcome(d / "y.tsv", ids, {"y": y, "age": rng.uniform(20, 60, N)})
    return ds.path, out


def _screen_args(store: Path, outcome: Path, d: Path, *extra: str) -> list[str]:
    return [
        "screen",
        str(store),
        "--outcome",
        str(outcome),
        "--response",
        "y",
        "--out",
        str(d / "run"),
        "--quiet",
        "--no-report",
        *extra,
    ]


def _damaged(how: Callable[[Path], None]):
    def make(d: Path) -> list[str]:
        store, outcome = _store(d)
        how(store)
        return _screen_args(store, outcome, d)

    return make


def _attrs(**changes):
    def how(store: Path) -> None:
        meta = json.loads((store / "zarr.json").read_text())
        meta["attributes"]["widescreen"].update(changes)
        (store / "zarr.json").write_text(json.dumps(meta))

    return how


def _drop_attrs(store: Path) -> None:
    meta = json.loads((store / "zarr.json").read_text())
    del meta["attributes"]["widescreen"]
    (store / "zarr.json").write_text(json.dumps(meta))


def _chunk(store: Path, c: int) -> Path:
    return store / "X" / "c" / "0" / str(c)


def _flip(path: Path, at: float = 0.5) -> None:
    data = bytearray(path.read_bytes())
    i = int(len(data) * at)
    data[i : i + 16] = bytes(b ^ 0xFF for b in data[i : i + 16])
    path.write_bytes(bytes(data))


def _swap(store: Path) -> None:
    a, b = _chunk(store, 1), _chunk(store, 2)
    da, db = a.read_bytes(), b.read_bytes()
    a.write_bytes(db)
    b.write_bytes(da)


def _x_as_uint8(store: Path) -> None:
    g = zarr.open_group(store, mode="r+")
    x = g["X"][:]
    del g["X"]
    g.create_array("X", shape=x.shape, chunks=(N, 8), dtype="uint8")[:] = x.view(np.uint8)


def _outcome(body: str | bytes, *extra: str, response="y", name="y.tsv"):
    def make(d: Path) -> list[str]:
        store, _ = _store(d)
        data = body.encode() if isinstance(body, str) else body
        (d / name).write_bytes(data)
        args = _screen_args(store, d / name, d, *extra)
        args[args.index("--response") + 1] = response
        return args

    return make


def _outcome_rows(values: dict[str, list], *extra: str, response="y"):
    ids = [f"s{i}" for i in range(N)]
    head = "sample\t" + "\t".join(values)
    rows = [ids[i] + "\t" + "\t".join(str(v[i]) for v in values.values()) for i in range(N)]
    return _outcome(head + "\n" + "\n".join(rows) + "\n", *extra, response=response)


def _ys(bad_at: int, bad: str) -> list:
    y = [f"{0.1 * i:.1f}" for i in range(N)]
    y[bad_at] = bad
    return y


# ------------------------------------------------------------------------------------------------
# the cases

X_CSV = r"x\.csv"
CASES = [
    # ---- CSV / TSV: structure
    Case("csv-empty", _csv(""), rf"{X_CSV}: empty file"),
    Case("csv-header-only", _csv("id,a,b\n"), rf"{X_CSV}: a header but no data rows"),
    Case("csv-one-field", _csv("id\ns1\n"), rf"{X_CSV}: line 1 has a single field"),
    Case(
        "csv-empty-feature-id",
        _csv("id,a,,c\ns1,1,2,3\n"),
        rf"{X_CSV}: line 1, column 3: empty feature id",
    ),
    Case(
        "csv-duplicate-feature",
        _csv("id,a,a\ns1,1,2\n"),
        rf"{X_CSV}: duplicate feature id 'a' at line 1, column 2 and line 1, column 3",
    ),
    Case(
        "csv-duplicate-sample",
        _csv("id,a\ns1,1\ns2,2\ns1,3\n"),
        rf"{X_CSV}: duplicate sample id 's1' at line 2 and line 4",
    ),
    Case(
        "csv-empty-sample-id",
        _csv("id,a\ns1,1\n,2\n"),
        rf"{X_CSV}: line 3, column 1: empty sample id",
    ),
    Case(
        "csv-short-row",
        _csv("id,a,b\ns1,1,2\ns2,1\n"),
        rf"{X_CSV}: line 3 has 2 fields but the header has 3: column 3",
    ),
    Case("csv-long-row", _csv("id,a,b\ns1,1,2,3\n"), rf"{X_CSV}: line 2 has more than 3 fields"),
    Case("csv-unknown-extension", _text("x.dat", CSV_OK), r"x\.dat: unknown extension '\.dat'"),
    Case("csv-gzip-truncated", _truncated_gz("x.csv.gz", CSV_OK), r"x\.csv\.gz: cannot decompress"),
    Case("tsv-with-commas", _text("x.tsv", CSV_OK), r"x\.tsv: line 1 has a single field"),
    Case("csv-exists", _existing(True), r"s\.zarr: already exists .*--overwrite to replace it"),
    Case(
        "csv-killed-import-left",
        _existing(False),
        r"s\.zarr: holds an import that did not finish.*--overwrite",
    ),
    # ---- CSV / TSV: values
    Case(
        "csv-text-cell",
        _csv("id,a,b\ns1,1,abc\n"),
        rf"{X_CSV}: line 2 \(sample 's1'\), column 3 \(feature 'b'\): 'abc' is not a number",
    ),
    Case(
        "csv-inf",
        _csv("id,a,b\ns1,1,inf\n"),
        rf"{X_CSV}: line 2 \(sample 's1'\), column 3 \(feature 'b'\): 'inf' is not a finite number",
    ),
    Case(
        "csv-minus-infinity",
        _csv("id,a,b\ns1,-Infinity,1\n"),
        rf"{X_CSV}: line 2 \(sample 's1'\), column 2 \(feature 'a'\): '-Infinity' is not a finite",
    ),
    Case(
        "csv-1e400",
        _csv("id,a\ns1,1e400\n"),
        rf"{X_CSV}: line 2 \(sample 's1'\), column 2 \(feature 'a'\): '1e400' is not a finite",
    ),
    Case(
        "csv-overflow-float32",
        _csv("id,a\ns1,1\ns2,1e300\n"),
        rf"{X_CSV}: line 3 \(sample 's2'\), column 2 \(feature 'a'\): '1e300' does not fit in float32",
    ),
    Case(
        "csv-overflow-negative",
        _csv("id,a,b\ns1,1,-4e38\n"),
        rf"{X_CSV}: line 2 \(sample 's1'\), column 3 \(feature 'b'\): '-4e38' does not fit in float32",
    ),
    Case(
        "csv-inf-as-missing-overflow",
        _csv("id,a\ns1,inf\ns2,1e300\n", extra=["--inf-as-missing"]),
        rf"{X_CSV}: line 3 \(sample 's2'\), column 2.*does not fit in float32",
    ),
    Case(
        "csv-nul-in-cell",
        _csv(b"id,a,b\ns1,1,1\x00\n"),
        rf"{X_CSV}: line 2 \(sample 's1'\), column 3 \(feature 'b'\): .* is not a number",
    ),
    Case(
        "csv-nul-alone",
        _csv(b"id,a,b\ns1,\x00,1\n"),
        rf"{X_CSV}: line 2 \(sample 's1'\), column 2 \(feature 'a'\): .* is not a number",
    ),
    Case(
        "csv-decimal-comma",
        _text("x.tsv", "id\ta\ns1\t1,5\n"),
        r"x\.tsv: line 2 \(sample 's1'\), column 2 \(feature 'a'\): '1,5' is not a number",
    ),
    Case(
        "csv-hex",
        _csv("id,a\ns1,0x10\n"),
        rf"{X_CSV}: line 2 \(sample 's1'\), column 2 \(feature 'a'\): '0x10' is not a number",
    ),
    Case(
        "csv-double-minus",
        _csv("id,a\ns1,--1\n"),
        rf"{X_CSV}: line 2 .*column 2 .*'--1' is not a number",
    ),
    Case(
        "csv-bare-exponent",
        _csv("id,a\ns1,1e\n"),
        rf"{X_CSV}: line 2 .*column 2 .*'1e' is not a number",
    ),
    Case(
        "csv-two-points",
        _csv("id,a\ns1,1.2.3\n"),
        rf"{X_CSV}: line 2 .*column 2 .*'1\.2\.3' is not a number",
    ),
    Case(
        "csv-later-batch-error",
        _csv("id,a\n" + "".join(f"s{i},{i}\n" for i in range(500)) + "t,x\n"),
        rf"{X_CSV}: line 502 \(sample 't'\), column 2 \(feature 'a'\): 'x' is not a number",
    ),
    # ---- CSV / TSV: ids that would break the outputs, and text that is not UTF-8
    Case(
        "csv-tab-in-feature-id",
        _csv("id,a\tb,c\ns1,1,2\n"),
        rf"{X_CSV}: line 1, column 2: feature id 'a\\tb' holds a tab",
    ),
    Case(
        "csv-cr-in-feature-id",
        _csv("id,a\rb,c\ns1,1,2\n"),
        rf"{X_CSV}: line 1, column 2: feature id 'a\\rb' holds a carriage return",
    ),
    Case(
        "csv-nul-in-feature-id",
        _csv(b"id,a\x00b,c\ns1,1,2\n"),
        rf"{X_CSV}: line 1, column 2: feature id .* holds a NUL byte",
    ),
    Case(
        "csv-tab-in-sample-id",
        _csv("id,a\ns\t1,1\n"),
        rf"{X_CSV}: line 2: sample id 's\\t1' holds a tab",
    ),
    Case(
        "csv-latin1-feature-id",
        _csv("id,a,caf\xe9\ns1,1,2\n".encode("latin-1")),
        rf"{X_CSV}: line 1, column 3: not UTF-8 text \(byte 0xe9",
    ),
    Case(
        "csv-latin1-sample-id",
        _csv("id,a\ns1,1\nJos\xe9,2\n".encode("latin-1")),
        rf"{X_CSV}: line 3, column 1: not UTF-8 text \(byte 0xe9",
    ),
    Case(
        "csv-latin1-value",
        _csv("id,a\ns1,1\xe9\n".encode("latin-1")),
        rf"{X_CSV}: line 2 \(sample 's1'\), column 2 \(feature 'a'\): .* is not a number",
    ),
    # ---- CSV / TSV: dosages
    Case(
        "dosage-3",
        _csv("id,a,b\ns1,1,3\n", dosage=True),
        rf"{X_CSV}: line 2 \(sample 's1'\), column 3 \(feature 'b'\): '3' is not a dosage",
    ),
    Case(
        "dosage-minus-1",
        _csv("id,a,b\ns1,-1,2\n", dosage=True),
        rf"{X_CSV}: line 2 .*column 2 \(feature 'a'\): '-1' is not a dosage",
    ),
    Case(
        "dosage-half",
        _csv("id,a\ns1,1\ns2,1.5\n", dosage=True),
        rf"{X_CSV}: line 3 \(sample 's2'\), column 2 .*'1\.5' is not a dosage",
    ),
    Case(
        "dosage-text",
        _csv("id,a\ns1,AA\n", dosage=True),
        rf"{X_CSV}: line 2 .*column 2 .*'AA' is not a dosage",
    ),
    Case(
        "dosage-nul",
        _csv(b"id,a,b\ns1,1,\x00\n", dosage=True),
        rf"{X_CSV}: line 2 \(sample 's1'\), column 3 \(feature 'b'\): .* is not a dosage",
    ),
    Case(
        "dosage-inf",
        _csv("id,a\ns1,inf\n", dosage=True),
        rf"{X_CSV}: line 2 .*column 2 .*'inf' is not a dosage",
    ),
    Case(
        "rows-are-features-duplicate-sample",
        _text("x.csv", "id,s1,s1\nf1,1,2\n", extra=["--features-as-rows"]),
        rf"{X_CSV}: duplicate sample id 's1' at line 1, column 2 and line 1, column 3",
    ),
    Case(
        "rows-are-features-short",
        _text("x.csv", "id,s1,s2\nf1,1,2\nf2,1\n", extra=["--features-as-rows"]),
        rf"{X_CSV}: line 3 has 2 fields but the header has 3",
    ),
    Case(
        "rows-are-features-duplicate-feature",
        _text("x.csv", "id,s1,s2\nf1,1,2\nf1,1,0\n", extra=["--features-as-rows"]),
        rf"{X_CSV}: duplicate feature id 'f1' at line 2 and line 3",
    ),
    # ---- VCF
    Case("vcf-empty", _vcf(""), r"x\.vcf: .*(no '#CHROM'|empty|header)"),
    Case(
        "vcf-no-header",
        _vcf("1\t100\trs1\tA\tG\t.\tPASS\t.\tGT\t0/1\n"),
        r"x\.vcf: line 1: expected '##' meta lines and then the '#CHROM' header",
    ),
    Case(
        "vcf-no-samples",
        _vcf(_vcf_text(samples=())),
        r"x\.vcf: line 2: the header must read #CHROM POS ID REF ALT QUAL FILTER INFO FORMAT",
    ),
    Case(
        "vcf-wrong-header",
        _vcf(_vcf_text(header="#CHROM\tPOS\tID\tREF\tALT\tQUAL\tFILTER\tFORMAT\tINFO\ta")),
        r"x\.vcf: line 2: the header must read",
    ),
    Case(
        "vcf-duplicate-sample",
        _vcf(_vcf_text(samples=("a", "a"))),
        r"x\.vcf: duplicate sample id 'a' at line 2, column 10 and line 2, column 11",
    ),
    Case(
        "vcf-empty-sample",
        _vcf(_vcf_text(samples=("a", ""))),
        r"x\.vcf: line 2, column 11: empty sample id",
    ),
    Case(
        "vcf-latin1-sample",
        _vcf(_vcf_text(samples=("a", "Jos\xe9")).encode("latin-1")),
        r"x\.vcf: line 2, column 11: not UTF-8 text \(byte 0xe9",
    ),
    Case(
        "vcf-too-few-columns",
        _vcf(_vcf_text(lines=["1\t100\trs1\tA\tG\t.\tPASS\t.\tGT\t0/1"])),
        r"x\.vcf: line 3",
    ),
    Case(
        "vcf-pos-not-number",
        _vcf(_vcf_text(lines=[_site(pos="1x")])),
        r"x\.vcf: line 3: POS '1x' is not a whole number",
    ),
    Case(
        "vcf-no-gt",
        _vcf(_vcf_text(lines=[_site(fmt="DP", calls=("3", "4"))])),
        r"x\.vcf: line 3: FORMAT 'DP' has no GT key",
    ),
    Case(
        "vcf-bad-genotype",
        _vcf(_vcf_text(lines=[_site(calls=("0/1", "0/x"))])),
        r"x\.vcf: line 3, column 11 \(sample 'b'\): genotype '0/x' is not like",
    ),
    Case(
        "vcf-allele-beyond-alt",
        _vcf(_vcf_text(lines=[_site(calls=("0/2", "0/1"))])),
        r"x\.vcf: line 3, column 10 \(sample 'a'\): allele index 2 but the site has 1 ALT",
    ),
    Case(
        "vcf-triploid-3",
        _vcf(_vcf_text(lines=[_site(), _site(pos="200", vid="rs2", calls=("1/1/1", "0/1"))])),
        r"x\.vcf: line 4, column 10 \(sample 'a'\): a call with 3 alternate alleles",
    ),
    Case(
        "vcf-pentaploid-5",
        _vcf(_vcf_text(lines=[_site(calls=("0/1", "1|1|1|1|1"))])),
        r"x\.vcf: line 3, column 11 \(sample 'b'\): a call with 5 alternate alleles",
    ),
    Case(
        "vcf-latin1-chrom",
        _vcf(_vcf_text(lines=[_site(chrom="chr\xe9")]).encode("latin-1")),
        r"x\.vcf: line 3, column 1: not UTF-8 text \(byte 0xe9",
    ),
    Case(
        "vcf-latin1-id",
        _vcf(_vcf_text(lines=[_site(vid="rs\xe9")]).encode("latin-1")),
        r"x\.vcf: line 3, column 3: not UTF-8 text",
    ),
    Case(
        "vcf-empty-ref",
        _vcf(_vcf_text(lines=[_site(ref="")])),
        r"x\.vcf: line 3: empty CHROM, REF or ALT",
    ),
    Case(
        "vcf-duplicate-id",
        _vcf(_vcf_text(lines=[_site(), _site(pos="200")])),
        r"x\.vcf: duplicate feature id 'rs1' at line 3 and line 4",
    ),
    Case(
        "vcf-gzip-truncated",
        _truncated_gz("x.vcf.gz", _vcf_text(lines=[_site()] * 1)),
        r"x\.vcf\.gz: cannot decompress",
    ),
    # ---- .npy
    Case("npy-not-npy", _npy(b"hello, this is text\n"), r"x\.npy: not a readable \.npy file"),
    Case(
        "npy-1d",
        _npy(np.zeros(5, np.float32)),
        r"x\.npy: need a 2-d array \(samples, features\); got shape \(5,\)",
    ),
    Case(
        "npy-3d",
        _npy(np.zeros((2, 3, 4), np.float32)),
        r"x\.npy: need a 2-d array .*got shape \(2, 3, 4\)",
    ),
    Case("npy-empty", _npy(np.zeros((0, 4), np.float32)), r"x\.npy: empty array of shape \(0, 4\)"),
    Case(
        "npy-strings",
        _npy(np.array([["a", "b"], ["c", "d"]])),
        r"x\.npy: cannot import dtype <U1: need integers or floats",
    ),
    Case(
        "npy-complex",
        _npy(np.zeros((2, 2), np.complex64)),
        r"x\.npy: cannot import dtype complex64",
    ),
    Case(
        "npy-objects",
        _npy(np.array([[1, None]], dtype=object)),
        r"x\.npy: not a readable \.npy file",
    ),
    Case(
        "npy-int32-needs-kind",
        _npy(np.zeros((2, 2), np.int32)),
        r"x\.npy: dtype int32 needs value_kind",
    ),
    Case(
        "npy-inf",
        _npy(np.array([[1.0, np.inf], [0.0, 1.0]], np.float32)),
        r"x\.npy: row 1 \(sample 's1'\), column 2 \(feature 'f2'\): value inf is not finite",
    ),
    Case(
        "npy-minus-inf-f64",
        _npy(np.array([[1.0, 2.0], [-np.inf, 1.0]])),
        r"x\.npy: row 2 \(sample 's2'\), column 1 \(feature 'f1'\): value -inf is not finite",
    ),
    Case(
        "npy-dosage-3",
        _npy(np.array([[0, 1], [3, 2]], np.int8)),
        r"x\.npy: row 2 \(sample 's2'\), column 1 \(feature 'f1'\): value 3 is not a dosage",
    ),
    Case(
        "npy-dosage-float-half",
        _npy(np.array([[0.5, 1.0]]), "--dosage"),
        r"x\.npy: row 1 \(sample 's1'\), column 1 \(feature 'f1'\): value 0\.5 is not a dosage",
    ),
    Case("npy-truncated", _npy_truncated, r"x\.npy: (not a readable \.npy file|file ended early)"),
    # ---- stores
    Case(
        "store-missing",
        lambda d: _screen_args(d / "none.zarr", _store(d)[1], d),
        r"none\.zarr: no such store",
    ),
    Case(
        "store-not-zarr",
        lambda d: (d / "plain").mkdir() or _screen_args(d / "plain", _store(d)[1], d),
        r"plain: not a Zarr v3 group \(no zarr\.json\)",
    ),
    Case(
        "store-no-attrs",
        _damaged(_drop_attrs),
        r"x\.zarr: not a widescreen dataset \(no 'widescreen' attributes\)",
    ),
    Case(
        "store-incomplete",
        _damaged(_attrs(complete=False)),
        r"x\.zarr: incomplete store \(its import did not finish\)",
    ),
    Case(
        "store-version-9",
        _damaged(_attrs(format_version=9)),
        r"x\.zarr: format version 9; this widescreen reads versions 1, 2",
    ),
    Case(
        "store-value-kind-edited",
        _damaged(_attrs(value_kind="continuous")),
        r"x\.zarr/zarr\.json: a continuous store holds float32 or float64, but its attributes say dtype 'int8'",
    ),
    Case(
        "store-dtype-edited",
        _damaged(_attrs(value_kind="continuous", dtype="float32", missing_sentinel=None)),
        r"x\.zarr/X: stored as int8, but the attributes say float32",
    ),
    Case(
        "store-sentinel-edited",
        _damaged(_attrs(missing_sentinel=0)),
        r"x\.zarr/zarr\.json: missing_sentinel 0 does not fit a int8 store",
    ),
    Case(
        "store-shape-edited",
        _damaged(_attrs(n_features=33)),
        r"x\.zarr: X has shape \(30, 32\) but the attributes say \(30, 33\)",
    ),
    Case(
        "store-x-uint8",
        _damaged(_x_as_uint8),
        r"x\.zarr/X: stored as uint8, but the attributes say int8",
    ),
    Case(
        "store-chunk-missing",
        _damaged(lambda s: _chunk(s, 1).unlink()),
        r"missing chunk 0/1 of .*x\.zarr/X \(features 8\.\.15\)",
    ),
    Case(
        "store-chunk-truncated",
        _damaged(lambda s: _chunk(s, 2).write_bytes(_chunk(s, 2).read_bytes()[:20])),
        r"corrupt chunk 0/2 of .*x\.zarr/X \(features 16\.\.23\)",
    ),
    Case(
        "store-chunks-swapped",
        _damaged(_swap),
        r"corrupt chunk 0/1 of .*x\.zarr/X \(features 8\.\.15\): it holds the data recorded for chunk 0/2",
    ),
    Case(
        "store-bit-rot",
        _damaged(lambda s: _flip(_chunk(s, 3))),
        r"corrupt chunk 0/3 of .*x\.zarr/X \(features 24\.\.31\): .*checksum",
    ),
    Case(
        "store-feature-ids-chunk-missing",
        _damaged(lambda s: shutil.rmtree(s / "features" / "id" / "c")),
        r"missing chunk 0 of .*x\.zarr/features/id",
    ),
    Case(
        "store-sample-ids-chunk-missing",
        _damaged(lambda s: shutil.rmtree(s / "samples" / "id" / "c")),
        r"x\.zarr/samples/id: empty sample id at position 1",
    ),
    Case(
        "store-sample-ids-damaged",
        _damaged(lambda s: _flip(s / "samples" / "id" / "c" / "0", 0.3)),
        r"x\.zarr/samples/id: cannot be read",
    ),
    Case(
        "store-checksum-table-gone",
        _damaged(lambda s: shutil.rmtree(s / "checksums")),
        r"x\.zarr: missing array 'checksums/X'",
    ),
    Case(
        "store-feature-ids-wrong-length",
        _damaged(lambda s: zarr.open_group(s, mode="r+")["features/id"].resize((31,))),
        r"x\.zarr/features/id: has shape \(31,\); X's attributes need \(32,\)",
    ),
    # ---- outcome tables
    Case(
        "outcome-missing",
        lambda d: _screen_args(_store(d)[0], d / "none.tsv", d),
        r"none\.tsv: no such outcome table",
    ),
    Case("outcome-empty", _outcome(""), r"y\.tsv: empty file"),
    Case(
        "outcome-one-column",
        _outcome("sample\ns1\n"),
        r"y\.tsv: line 1: need a sample id column and at least one outcome column",
    ),
    Case("outcome-header-only", _outcome("sample\ty\n"), r"y\.tsv: header only, no samples"),
    Case(
        "outcome-duplicate-column",
        _outcome("sample\ty\ty\ns1\t1\t2\n"),
        r"y\.tsv: line 1: column 'y' appears twice",
    ),
    Case(
        "outcome-ragged",
        _outcome("sample\ty\ns1\t1\ns2\n".replace("s2\n", "s2\t1\t3\n")),
        r"y\.tsv: line 3: 3 fields, the header has 2",
    ),
    Case(
        "outcome-duplicate-sample",
        _outcome("sample\ty\ns1\t1\ns1\t2\n"),
        r"y\.tsv: sample id 's1' appears twice \(lines 2 and 3\)",
    ),
    Case(
        "outcome-no-response",
        _outcome_rows({"y": _ys(0, "1")}, response="z"),
        r"y\.tsv: no column 'z'; the table has: y",
    ),
    Case(
        "outcome-text-response",
        _outcome_rows({"y": _ys(4, "tall")}),
        r"y\.tsv: column 'y', line 6: 'tall' is not a number",
    ),
    Case(
        "outcome-inf-response",
        _outcome_rows({"y": _ys(7, "inf")}),
        r"y\.tsv: column 'y', line 9: 'inf' is not a finite number",
    ),
    Case(
        "outcome-constant-response",
        _outcome_rows({"y": ["2.5"] * N}),
        r"y\.tsv: column 'y' is constant over the 30 analysed samples",
    ),
    Case(
        "outcome-no-id-matches",
        _outcome("sample\ty\nq1\t1\nq2\t2\n"),
        r"y\.tsv: none of its 2 sample ids are in the store",
    ),
    Case(
        "outcome-latin1",
        _outcome("sample\ty\ns1\t1\ns2\t2\xe9\n".encode("latin-1")),
        r"y\.tsv: line 3, column 2: not UTF-8 text \(byte 0xe9\)",
    ),
    Case(
        "outcome-nul",
        _outcome(b"sample\ty\ns1\t1\x00\n"),
        r"y\.tsv: line 2, column 2: a NUL byte in the cell",
    ),
    Case(
        "outcome-constant-covariate",
        _outcome_rows({"y": _ys(0, "1"), "age": ["40"] * N}, "--covariates", "age"),
        r"y\.tsv: covariate 'age' is constant over the analysed samples",
    ),
    Case(
        "outcome-covariate-text",
        _outcome_rows({"y": _ys(0, "1"), "age": _ys(9, "old")}, "--covariates", "age"),
        r"y\.tsv: column 'age', line 11: 'old' is not a number",
    ),
    Case(
        "outcome-response-is-covariate",
        _outcome_rows({"y": _ys(0, "1"), "age": _ys(0, "1")}, "--covariates", "age"),
        r"y\.tsv: column 'y' is fully explained by the covariates",
    ),
    Case(
        "outcome-unknown-covariate",
        _outcome_rows({"y": _ys(0, "1")}, "--covariates", "bmi"),
        r"y\.tsv: no column 'bmi'",
    ),
]


def test_there_are_enough_cases():
    kinds = {c.name.split("-")[0] for c in CASES}
    assert len(CASES) >= 80
    assert {"csv", "dosage", "vcf", "npy", "store", "outcome"} <= kinds


def _no_complete_output(d: Path, args: list[str]) -> None:
    if args[0] == "import":
        store = Path(args[2])
        if store.exists():
            with pytest.raises(StoreError):
                open_dataset(store)
    else:
        assert not (d / "run" / "ranking.tsv").exists()
        man = d / "run" / "manifest.json"
        if man.exists():  # a failure inside the pass: recorded as failed, never complete
            assert json.loads(man.read_text())["status"].startswith("failed")


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_malformed_input_is_refused_with_its_location(tmp_path, case):
    args = case.make(tmp_path)
    existed = args[0] == "import" and Path(args[2]).exists()
    res = runner.invoke(app, args)
    err = res.stderr if hasattr(res, "stderr") else res.output
    lines = [line for line in err.splitlines() if line.strip()]
    assert res.exit_code == case.code, (res.exit_code, err, res.exception)
    assert len(lines) == 1 and lines[0].startswith("error: "), err
    assert "(a bug" not in lines[0]
    assert re.search(case.says, lines[0]), lines[0]
    if not existed:
        _no_complete_output(tmp_path, args)
