"""VCF import of imputed dosages (DS), FILTER = PASS only, and chunks sized by the data.

DS is the VCF 4.x FORMAT key for the expected ALT-allele dosage of a call (Number=A: one value per
ALT allele); FILTER holds PASS for a site that passed every filter (the VCF 4.3 specification,
sections 1.6.1 and 1.6.2). Expected values below are written out by hand from the lines shown.
"""

from __future__ import annotations

import numpy as np
import pytest
from typer.testing import CliRunner

from widescreen.cli import app
from widescreen.report import read_tsv
from widescreen.store import open_dataset
from widescreen.store._ingest_text import IngestError
from widescreen.store._ingest_vcf import import_vcf

HEAD = "##fileformat=VCFv4.3\n#CHROM\tPOS\tID\tREF\tALT\tQUAL\tFILTER\tINFO\tFORMAT"
NAN = np.nan


def vcf(path, samples, lines):
    body = "".join("\t".join(r) + "\n" for r in lines)
    path.write_text(HEAD + "\t" + "\t".join(samples) + "\n" + body)
    return path


def site(pos, vid, alt, fmt, *calls, filt="PASS", ref="A"):
    return ["1", str(pos), vid, ref, alt, ".", filt, ".", fmt, *calls]


LINES = [
    site(10, "a", "G", "GT:DS", "0/0:0.02", "0/1:0.97", "1/1:1.9", "./.:."),
    site(20, "b", "T", "DS:GT", "1.25:0/1", "0:0/0", "2:1/1", "0.5"),  # DS first
    site(30, "c", "C", "GT", "0/1", "1/1", "./.", "0|0"),  # no DS: from GT
    site(40, "d", "G", "GT:DP:DS", "0/1:9:0.5", "0/0:9", "1/1:3:1.75", "0/1:2:1e-1"),
    site(50, "e", "T", "DS", "0", "0.333", "2", "1."),  # DS alone, no GT
]
SAMPLES = ["p1", "p2", "p3", "p4"]
EXPECTED_DS = np.array(
    [
        [0.02, 0.97, 1.9, NAN],
        [1.25, 0.0, 2.0, 0.5],
        [1.0, 2.0, NAN, 0.0],
        [0.5, NAN, 1.75, 0.1],  # p2's field stops before DS: missing
        [0.0, 0.333, 2.0, 1.0],
    ]
)


def test_ds_values_are_read_as_float_dosages(tmp_path):
    src = vcf(tmp_path / "x.vcf", SAMPLES, LINES)
    ds = import_vcf(src, tmp_path / "s", values="ds")
    assert ds.attrs.value_kind == "dosage" and ds.dtype == np.float32
    np.testing.assert_allclose(ds.X[:].T, EXPECTED_DS.astype(np.float32), equal_nan=True)
    assert list(ds.feature_ids()) == ["a", "b", "c", "d", "e"]
    np.testing.assert_array_equal(ds.annotations()["pos"], [10, 20, 30, 40, 50])


def test_without_ds_the_genotypes_are_used_and_a_line_needs_gt(tmp_path):
    src = vcf(tmp_path / "x.vcf", SAMPLES, LINES[:4])
    ds = import_vcf(src, tmp_path / "s")
    assert ds.dtype == np.int8
    np.testing.assert_array_equal(ds.X[:, 0], [0, 1, 2, -128])
    src = vcf(tmp_path / "y.vcf", SAMPLES, LINES)
    with pytest.raises(IngestError, match=r"y\.vcf: line 7: FORMAT 'DS' has no GT key"):
        import_vcf(src, tmp_path / "t")


def test_multiallelic_ds_split_and_nonref(tmp_path):
    lines = [
        site(10, "m", "G,T", "GT:DS", "1/2:0.9,1.1", "0/0:0,0", "./.:.", "2/2:0.1,1.8"),
        site(20, "b", "T", "GT:DS", "0/1:1", "0/0:0", "1/1:2", "0/1:1"),
    ]
    src = vcf(tmp_path / "x.vcf", SAMPLES, lines)
    ds = import_vcf(src, tmp_path / "s", values="ds")
    assert list(ds.feature_ids()) == ["m:G", "m:T", "b"]
    X = ds.X[:].T
    np.testing.assert_allclose(X[0], [0.9, 0, NAN, 0.1], rtol=1e-6, equal_nan=True)
    np.testing.assert_allclose(X[1], [1.1, 0, NAN, 1.8], rtol=1e-6, equal_nan=True)
    ds = import_vcf(src, tmp_path / "n", values="ds", multiallelic="nonref")
    np.testing.assert_allclose(ds.X[:, 0], [2.0, 0, NAN, 1.9], rtol=1e-6, equal_nan=True)


@pytest.mark.parametrize(
    ("call", "message"),
    [
        ("0/1:x1", r"line 3, column 11 \(sample 'p2'\): DS 'x1' is not a dosage"),
        ("0/1:-0.5", r"line 3, column 11 \(sample 'p2'\): DS '-0.5' is not a dosage"),
        ("0/1:inf", r"DS 'inf' is not a dosage"),
    ],
)
def test_bad_ds_values_name_line_and_sample(tmp_path, call, message):
    lines = [site(10, "a", "G", "GT:DS", "0/0:0", call, "1/1:2", "0/1:1")]
    src = vcf(tmp_path / "x.vcf", SAMPLES, lines)
    with pytest.raises(IngestError, match=message):
        import_vcf(src, tmp_path / "s", values="ds")


def test_bad_multiallelic_ds_is_named(tmp_path):
    lines = [site(10, "m", "G,T", "GT:DS", "1/2:0.9", "0/0:0,0", "0/0:0,0", "0/0:0,0")]
    src = vcf(tmp_path / "x.vcf", SAMPLES, lines)
    with pytest.raises(IngestError, match=r"line 3, column 10 \(sample 'p1'\): DS '0.9' is not 2"):
        import_vcf(src, tmp_path / "s", values="ds")


def test_pass_only_leaves_out_filtered_sites(tmp_path):
    lines = [
        site(10, "a", "G", "GT", "0/1", "0/0", "1/1", "0/1"),
        site(20, "b", "G", "GT", "0/1", "0/0", "1/1", "0/1", filt="q10"),
        site(30, "c", "G", "GT", "0/1", "0/0", "1/1", "0/1", filt="."),
        site(40, "d", "G", "GT", "1/1", "0/0", "1/1", "0/1"),
    ]
    src = vcf(tmp_path / "x.vcf", SAMPLES, lines)
    assert import_vcf(src, tmp_path / "all").n_features == 4
    ds = import_vcf(src, tmp_path / "pass", pass_only=True)
    assert list(ds.feature_ids()) == ["a", "d"]
    np.testing.assert_array_equal(ds.X[:, 1], [2, 0, 2, 1])
    none = vcf(tmp_path / "none.vcf", SAMPLES, lines[1:3])
    with pytest.raises(IngestError, match=r"no variant lines .*2 site\(s\) left out: FILTER"):
        import_vcf(none, tmp_path / "n", pass_only=True)


def _random_vcf(path, rng, n, p):
    samples = [f"s{i}" for i in range(n)]
    calls = rng.choice(["0/0", "0/1", "1/1"], size=(p, n), p=[0.5, 0.35, 0.15])
    lines = [site(100 + j, f"v{j}", "G", "GT", *calls[j]) for j in range(p)]
    return vcf(path, samples, lines), calls


@pytest.mark.parametrize(("p", "width"), [(401, 256), (100, 100)])
def test_chunks_are_sized_by_the_data(tmp_path, rng, p, width):
    # A 120 x 401 file: at least about eight blocks per pass but never below 256 features, and
    # never wider than the data (common practice for chunked arrays: no chunk larger than the array).
    src, calls = _random_vcf(tmp_path / "x.vcf", rng, 120, p)
    ds = import_vcf(src, tmp_path / "s")
    assert ds.chunks == (120, width)
    counts = {"0/0": 0, "0/1": 1, "1/1": 2}
    expected = np.vectorize(counts.get)(calls).T
    np.testing.assert_array_equal(ds.X[:], expected)


def test_chunks_estimated_when_the_file_is_longer_than_the_read_ahead(tmp_path, rng, monkeypatch):
    import widescreen.store._format as fmt
    import widescreen.store._ingest_vcf as ingest

    # Shrink the target chunk (20 samples x 64 int8 values) and the batches, so the read-ahead ends
    # long before the file does: the width then comes from the estimated feature count.
    monkeypatch.setattr(fmt, "TARGET_CHUNK_BYTES", 20 * 64)
    monkeypatch.setattr(ingest, "BATCH_BYTES", 2000)
    src, calls = _random_vcf(tmp_path / "x.vcf", rng, 20, 3000)
    ds = import_vcf(src, tmp_path / "s")
    assert ds.chunks == (20, 64)  # min(target 64, max(256, 3000 // 8)) -> 64
    np.testing.assert_array_equal(
        ds.X[:, -1], [{"0/0": 0, "0/1": 1, "1/1": 2}[c] for c in calls[-1]]
    )


def test_cli_imports_ds_and_screens_with_the_rare_filter(tmp_path, rng):
    n, p = 60, 30
    samples = [f"s{i}" for i in range(n)]
    dosage = rng.uniform(0.0, 2.0, size=(p, n)).round(3)
    dosage[5] = np.where(rng.random(n) < 0.05, 1.0, 0.0)  # minor allele frequency about 0.025
    lines = [
        site(100 + j, f"v{j}", "G", "GT:DS", *[f"0/1:{v}" for v in dosage[j]]) for j in range(p)
    ]
    src = vcf(tmp_path / "x.vcf", samples, lines)
    runner = CliRunner()
    res = runner.invoke(
        app, ["import", str(src), str(tmp_path / "s.zarr"), "--vcf-values", "ds", "-q"]
    )
    assert res.exit_code == 0, res.output
    assert "float32" in res.output
    y = dosage[5] * 3.0 + dosage[7] + rng.standard_normal(n) * 0.1  # v5 would lead unless dropped
    (tmp_path / "o.tsv").write_text(
        "sample\ty\n" + "".join(f"{s}\t{v}\n" for s, v in zip(samples, y, strict=True))
    )
    args = ["screen", str(tmp_path / "s.zarr"), "--outcome", str(tmp_path / "o.tsv")]
    args += ["--response", "y", "--shortlist", "5", "--no-report", "-q"]
    res = runner.invoke(app, [*args, "--out", str(tmp_path / "r"), "--drop-rare", "0.05"])
    assert res.exit_code == 0, res.output
    ranking = read_tsv(tmp_path / "r" / "ranking.tsv")
    assert "v5" not in set(ranking["feature"]) and ranking["feature"][0] == "v7"
    assert open_dataset(tmp_path / "s.zarr").dtype == np.float32
