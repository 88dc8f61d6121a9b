"""VCF import: genotype rules against hand-computed dosages, compression, ids and malformed lines.

The rules (count of ALT alleles per call, '.' anywhere -> missing) follow the VCF 4.x specification's
definition of the GT field; expected values below are worked out by hand from the calls shown.
"""

from __future__ import annotations

import gzip
import itertools

import numpy as np
import pytest

import widescreen.store._ingest_vcf as ingest
from widescreen.store import StoreError, open_dataset
from widescreen.store._ingest_text import IngestError
from widescreen.store._ingest_vcf import import_vcf

M = -128
HEAD = (
    "##fileformat=VCFv4.3\n##contig=<ID=1>\n#CHROM\tPOS\tID\tREF\tALT\tQUAL\tFILTER\tINFO\tFORMAT"
)


def vcf_text(samples, lines):
    body = "".join("\t".join(r) + "\n" for r in lines)
    return HEAD + "\t" + "\t".join(samples) + "\n" + body


def site(chrom, pos, vid, ref, alt, fmt, *calls):
    return [chrom, str(pos), vid, ref, alt, ".", "PASS", ".", fmt, *calls]


def write(path, text, *, members=1):
    if str(path).endswith(".gz"):
        data = text.encode()
        cut = [round(k * len(data) / members) for k in range(members + 1)]
        # Several concatenated gzip members, as bgzip writes them.
        path.write_bytes(b"".join(gzip.compress(data[a:b]) for a, b in itertools.pairwise(cut)))
    else:
        path.write_text(text)
    return path


LINES = [
    site("1", 100, "rs1", "A", "G", "GT", "0|0", "0|1", "1|0", "1|1"),  # phased
    site("1", 200, "rs2", "C", "T", "GT", "0/0", "0/1", "1/1", "./."),  # unphased, missing
    site("1", 300, ".", "G", "A", "GT:DP", ".|.:3", "0/.:4", ".:5", "1/0:9"),  # missing forms
    site("X", 400, "rsX", "T", "C", "GT", "0", "1", ".", "0/1"),  # haploid calls
    site("2", 500, "rsM", "A", "T,G", "GT", "1/2", "2|2", "0/1", "0/0"),  # multi-allelic
    site("2", 600, "rsD", "C", "G", "DP:GT:GQ", "5:0/1:9", "7:1|1:9", "8", "9:./.:0"),  # GT second
    site("2", 700, "rsP", "A", "C", "GT", "0/1/1", "0/0/1/1", "0/0/0", "./1/1"),  # polyploid
]
SAMPLES = ["ann", "bob", "cat", "dan"]
# Hand-computed: alt-allele counts per call, one row per feature.
EXPECTED_SPLIT = np.array(
    [
        [0, 1, 1, 2],
        [0, 1, 2, M],
        [M, M, M, 1],
        [0, 1, M, 1],
        [1, 0, 1, 0],  # rsM, ALT T: 1/2 has one T, 2|2 none, 0/1 one
        [1, 2, 0, 0],  # rsM, ALT G
        [1, 2, M, M],  # "8": the field stops before GT -> missing
        [2, 2, 0, M],
    ],
    np.int8,
)


@pytest.mark.parametrize("name,members", [("x.vcf", 1), ("x.vcf.gz", 1), ("x.vcf.gz", 3)])
def test_genotype_rules(tmp_path, name, members):
    src = write(tmp_path / name, vcf_text(SAMPLES, LINES), members=members)
    ds = import_vcf(src, tmp_path / "s")
    assert ds.attrs.value_kind == "dosage" and ds.dtype == np.int8
    np.testing.assert_array_equal(ds.X[:].T, EXPECTED_SPLIT)
    assert list(ds.sample_ids()) == SAMPLES
    assert list(ds.feature_ids()) == [
        "rs1", "rs2", "1:300:G:A", "rsX", "rsM:T", "rsM:G", "rsD", "rsP"
    ]  # fmt: skip
    ann = ds.annotations()
    assert list(ann["chrom"]) == ["1", "1", "1", "X", "2", "2", "2", "2"]
    np.testing.assert_array_equal(ann["pos"], [100, 200, 300, 400, 500, 500, 600, 700])


@pytest.mark.parametrize("call", ["1/1/1", "1|1|1|1", "0/1/1/1/1"])
def test_calls_beyond_dosage_two_are_refused_with_line_and_sample(tmp_path, call):
    lines = [
        site("1", 100, "rs1", "A", "G", "GT", "0/1", "1/1"),
        site("1", 200, "rs2", "A", "G", "GT", "0/0", call),
    ]
    src = write(tmp_path / "x.vcf", vcf_text(["a", "b"], lines))
    with pytest.raises(
        IngestError,
        match=r"x\.vcf: line \d+, column 11 \(sample 'b'\): a call with [345] alternate",
    ):
        import_vcf(src, tmp_path / "s")
    assert not (tmp_path / "s").exists()


def test_multiallelic_nonref_and_skip(tmp_path):
    src = write(tmp_path / "x.vcf", vcf_text(SAMPLES, LINES))
    ds = import_vcf(src, tmp_path / "a", multiallelic="nonref", id_from="position")
    # nonref: 1/2 -> 2, 2|2 -> 2, 0/1 -> 1, 0/0 -> 0
    np.testing.assert_array_equal(ds.X[:, 4], [2, 2, 1, 0])
    assert ds.n_features == 7
    assert ds.feature_ids()[4] == "2:500:A:T,G" and ds.feature_ids()[0] == "1:100:A:G"
    ds = import_vcf(src, tmp_path / "b", multiallelic="skip")
    assert ds.n_features == 6 and "rsM" not in set(ds.feature_ids())


def test_multi_digit_alleles_and_no_alt(tmp_path):
    alts = "C,G,T,AC,AG,AT,CA,CC,CG,CT,GA"  # 11 ALT alleles
    lines = [
        site("3", 10, "big", "A", alts, "GT", "11/0", "10|11", "0/1"),
        site("3", 20, "mono", "A", ".", "GT", "0/0", "./.", "0|0"),
    ]
    src = write(tmp_path / "x.vcf", vcf_text(["a", "b", "c"], lines))
    ds = import_vcf(src, tmp_path / "s")
    assert ds.n_features == 12
    X = ds.X[:]
    np.testing.assert_array_equal(X[:, 0], [0, 0, 1])  # ALT 1
    np.testing.assert_array_equal(X[:, 9], [0, 1, 0])  # ALT 10
    np.testing.assert_array_equal(X[:, 10], [1, 1, 0])  # ALT 11
    np.testing.assert_array_equal(X[:, 11], [0, M, 0])  # no ALT: one feature, 0 where called
    assert ds.feature_ids()[11] == "mono"


def reference_dosage(call: str, fmt: str) -> int:
    """Per-call Python reading of the GT rule, independent of the vectorised parser."""
    keys = fmt.split(":")
    parts = call.split(":")
    g = keys.index("GT")
    if g >= len(parts):
        return M
    alleles = parts[g].replace("|", "/").split("/")
    if "." in alleles:
        return M
    return sum(int(a) != 0 for a in alleles)


@pytest.mark.parametrize("batch", [None, 64])
def test_random_calls_match_reference(tmp_path, rng, monkeypatch, batch):
    if batch:  # batches shorter than a line: lines are carried over
        monkeypatch.setattr(ingest, "BATCH_BYTES", batch)
    n, m = 9, 60
    samples = [f"id{i}" for i in range(n)]
    lines, expected = [], []
    for j in range(m):
        fmt = ["GT", "GT:DP", "DP:GT"][j % 3]
        calls = []
        for _ in range(n):
            a = rng.choice(["0", "1", "."], 2, p=[0.5, 0.4, 0.1])
            gt = a[0] if rng.random() < 0.1 else a[0] + rng.choice(["|", "/"]) + a[1]
            calls.append({"GT": gt, "GT:DP": f"{gt}:7", "DP:GT": f"7:{gt}"}[fmt])
        lines.append(site("1", 1000 + j, f"v{j}", "A", "C", fmt, *calls))
        expected.append([reference_dosage(c, fmt) for c in calls])
    text = vcf_text(samples, lines).replace("\n", "\r\n")  # Windows line ends too
    src = write(tmp_path / "x.vcf", text)
    ds = import_vcf(src, tmp_path / "s", chunk_features=8)
    np.testing.assert_array_equal(ds.X[:].T, np.array(expected, np.int8))
    assert ds.chunks == (n, 8)


def test_progress(tmp_path, monkeypatch):
    monkeypatch.setattr(ingest, "BATCH_BYTES", 100)
    src = write(tmp_path / "x.vcf", vcf_text(SAMPLES, LINES))
    calls = []
    import_vcf(src, tmp_path / "s", progress=lambda d, t: calls.append((d, t)))
    assert len(calls) > 2 and calls[-1] == (src.stat().st_size, src.stat().st_size)


# --- malformed input: the line (counting header lines) and, for calls, column and sample --------


def _fails(tmp_path, text, match, **kw):
    src = tmp_path / "bad.vcf"
    src.write_text(text)
    with pytest.raises(IngestError, match=match) as err:
        import_vcf(src, tmp_path / "s", **kw)
    assert str(src) in str(err.value)
    if (tmp_path / "s").exists():
        with pytest.raises(StoreError):
            open_dataset(tmp_path / "s")
    return str(err.value)


def test_malformed_lines(tmp_path):
    ok = site("1", 100, "a", "A", "G", "GT", "0/1", "1/1")
    two = ["x", "y"]
    _fails(
        tmp_path,
        vcf_text(two, [ok, ok[:-1]]),
        "line 5: 10 tab-separated columns; expected 11",
        id_from="position",
    )
    _fails(
        tmp_path,
        vcf_text(two, [site("1", 5, "a", "A", "G", "DP", "1", "2")]),
        "line 4: FORMAT 'DP' has no GT",
    )
    _fails(
        tmp_path,
        vcf_text(two, [ok, site("1", 7, "b", "A", "G", "GT", "0/1", "0/2")]),
        r"line 5, column 11 \(sample 'y'\): allele index 2 but the site has 1 ALT",
    )
    _fails(
        tmp_path,
        vcf_text(two, [site("1", "12x", "a", "A", "G", "GT", "0", "1")]),
        "line 4: POS '12x'",
    )
    _fails(
        tmp_path,
        vcf_text(two, [site("1", 9, "a", "A", "G", "GT", "0/1", "A|G")]),
        r"line 4, column 11 \(sample 'y'\): genotype 'A\|G'",
    )


def test_duplicate_ids(tmp_path):
    a = site("1", 100, "rs1", "A", "G", "GT", "0/1")
    b = site("1", 200, "rs1", "C", "T", "GT", "0/1")
    msg = _fails(
        tmp_path, vcf_text(["x"], [a, b]), "duplicate feature id 'rs1' at line 4 and line 5"
    )
    assert "id_from='position'" in msg
    ds = import_vcf(tmp_path / "bad.vcf", tmp_path / "ok", id_from="position")
    assert list(ds.feature_ids()) == ["1:100:A:G", "1:200:C:T"]


def test_bad_headers(tmp_path):
    _fails(tmp_path, "##fileformat=VCFv4.3\n", "no '#CHROM' header line")
    _fails(tmp_path, "", "no '#CHROM' header line")
    _fails(tmp_path, "##x\n1\t2\n", "line 2: expected '##' meta lines")
    _fails(tmp_path, HEAD + "\n", "followed by at least one sample id")
    _fails(
        tmp_path,
        HEAD + "\ta\tb\ta\n",
        "duplicate sample id 'a' at line 3, column 10 and line 3, column 12",
    )
    _fails(tmp_path, HEAD + "\ta\n", "no variant lines")


def test_line_that_only_looks_fixed_width(tmp_path):
    # "0" and "1/0/1" take as many bytes as two 3-character calls: the fixed-width reading must
    # notice and fall back (haploid 0 -> 0; triploid 1/0/1 -> 2 ALT alleles).
    lines = [
        site("1", 1, "a", "A", "G", "GT", "0|1", "1/1"),
        site("1", 2, "b", "A", "G", "GT", "0", "1/0/1"),
        site("1", 3, "c", "A", "G", "GT", "1/0/1", "."),
    ]
    src = write(tmp_path / "x.vcf", vcf_text(["x", "y"], lines))
    ds = import_vcf(src, tmp_path / "s")
    np.testing.assert_array_equal(ds.X[:].T, [[1, 2], [0, 2], [2, M]])
