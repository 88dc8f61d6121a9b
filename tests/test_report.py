"""The report of a run folder: PNG figures, the HTML page, the optional iterative parts, the command."""

from __future__ import annotations

import base64
import json
import re
import shutil

import numpy as np
import pytest
import zarr
from matplotlib import image as mpimg
from scipy import stats
from typer.testing import CliRunner

from widescreen.cli import app
from widescreen.report import (
    ReportError,
    build_report,
    make_report,
    manhattan_plot,
    read_tsv,
    save_png,
    tsv,
)
from widescreen.store import DatasetWriter
from widescreen.workflow import ScreenConfig, screen

from .conftest import write_outcome

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # the PNG specification's file signature
runner = CliRunner()


@pytest.fixture(scope="module")
def study_run(tmp_path_factory):
    """A finished screen of a small annotated dosage store (two effects among 1500 features)."""
    root = tmp_path_factory.mktemp("report")
    rng = np.random.default_rng(7)
    n, p = 150, 1500
    ids = [f"person_{i:04d}" for i in range(n)]
    X = rng.binomial(2, rng.uniform(0.1, 0.5, p), size=(n, p)).astype(np.int8)
    X[:, 9] = 1  # a constant feature: not tested
    chrom = np.repeat(["chr1", "chr2", "chr10", "chrX"], [600, 500, 300, 100])
    pos = np.concatenate([np.arange(1, k + 1) * 1000 for k in (600, 500, 300, 100)])
    w = DatasetWriter(
        root / "s.zarr", ids, "dosage", "int8", n_features=p, chunks=(n, 256), annotations=True
    )
    w.append(X, [f"snp{j}" for j in range(p)], chrom, pos)
    w.finalize()
    y = 0.9 * X[:, 40] - 0.8 * X[:, 1200] + rng.normal(size=n)
    write_outcome(root / "o.tsv", ids, {"y": [repr(float(v)) for v in y]})
    screen(root / "s.zarr", root / "o.tsv", ScreenConfig(response="y", shortlist=12), root / "run")
    return root / "run"


@pytest.fixture
def run_copy(study_run, tmp_path):
    dst = tmp_path / "run"
    shutil.copytree(study_run, dst)
    for stale in ("report.html", "figures"):
        p = dst / stale
        shutil.rmtree(p) if p.is_dir() else p.unlink(missing_ok=True)
    return dst


def _edit_manifest(run, **changes):
    m = json.loads((run / "manifest.json").read_text())
    m.update(changes)
    (run / "manifest.json").write_text(json.dumps(m))


def test_figures_are_valid_pngs(run_copy):
    files = make_report(run_copy)
    names = sorted(p.name for p in files.figures)
    assert names == ["manhattan.png", "qq.png", "score_histogram.png"]
    for path in files.figures:
        data = path.read_bytes()
        assert data[:8] == PNG_SIGNATURE
        assert len(data) > 10_000
        img = mpimg.imread(path)  # decodes, so the file is a complete PNG
        assert img.shape[0] >= 300 and img.shape[1] >= 400
        assert img[..., :3].std() > 0.05  # not a blank canvas
    assert not list((run_copy / "figures").glob(".*tmp*"))  # no temporary files left


def test_lambda_gc_of_the_run_matches_scipy(run_copy):
    files = make_report(run_copy)
    g = zarr.open_group(run_copy / "passes" / "screen" / "stats", mode="r")
    p, score = g["p_value"][:], g["score"][:]
    tested = (g["filtered"][:] != 1) & ~((score == 0) & (p == 1))
    # Reference: median of scipy.stats.chi2.isf(p, 1) over scipy's chi-square(1) median.
    ref = np.median(stats.chi2.isf(p[tested], 1)) / stats.chi2.median(1)
    assert files.lambda_gc == pytest.approx(ref, rel=1e-12)
    assert tested.sum() == p.size - 1  # the constant feature is left out


def test_html_is_self_contained_with_cautions_and_top_feature(run_copy):
    html_path = build_report(run_copy, top=5)
    assert html_path == run_copy / "report.html"
    html = html_path.read_text()
    ranking = read_tsv(run_copy / "ranking.tsv")
    assert f">{ranking['feature'][0]}<" in html  # the top feature, in the table
    assert f">{ranking['feature'][4]}<" in html and f">{ranking['feature'][5]}<" not in html
    for caution in (
        "not evidence of causation",
        "not a diagnosis",
        "need replication",
        "not valid as plain p-values",
        "sensitive personal data",
    ):
        assert caution in html
    assert "lambda_GC" in html and "150" in html  # samples analysed
    imgs = re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', html)
    assert len(imgs) == 3
    on_disk = {p.read_bytes() for p in (run_copy / "figures").glob("*.png")}
    assert {base64.b64decode(s) for s in imgs} == on_disk
    assert not re.search(r'(src|href)="(https?:)?//', html)  # no external assets
    assert "<script" not in html
    assert "person_" not in html  # no sample identifiers
    assert "Selected model" not in html and "Iterations" not in html


def test_manhattan_uses_chromosomes_when_the_store_is_annotated(run_copy):
    html = build_report(run_copy).read_text()
    assert "by chromosome and position" in html
    _edit_manifest(run_copy, dataset={"path": str(run_copy / "moved.zarr"), "fingerprint": "x"})
    html = build_report(run_copy).read_text()
    assert "by feature index in the store" in html
    assert "not readable any more" in html
    assert (run_copy / "figures" / "manhattan.png").stat().st_size > 10_000


def test_iterative_files_are_used_when_present_and_absent_otherwise(run_copy):
    ranking = read_tsv(run_copy / "ranking.tsv")
    lam = np.geomspace(1.0, 0.01, 12)
    coefs = np.outer(np.maximum(0, 1 - lam), [0.8, -0.5, 0.1])
    _edit_manifest(
        run_copy,
        fit={
            "lambdas": lam.tolist(),
            "coefs": coefs.tolist(),
            "criterion_values": ((np.log(lam) + 2) ** 2).tolist(),
            "criterion": "ebic",
            "lambda_": float(lam[5]),
            "features": ranking["feature"][:3].tolist(),
        },
    )
    (run_copy / "iterations.tsv").write_text(
        tsv(
            {
                "iteration": [1, 2],
                "entered": [f"{ranking['feature'][0]},{ranking['feature'][1]}", ""],
                "left": ["", ""],
                "selected_size": [2, 2],
            }
        )
    )
    (run_copy / "model.tsv").write_text(
        tsv(
            {
                "feature": ranking["feature"][:2],
                "coefficient": [0.8, -0.5],
                "p_value": [1e-8, 1e-6],
            }
        )
    )
    files = make_report(run_copy)
    names = {p.stem for p in files.figures}
    assert {"iterations", "lambda_path", "criterion"} <= names
    html = files.html.read_text()
    assert "Selected model" in html and "Iterations" in html
    assert "diamonds: the 2 features of the selected model" in html
    # Without the files (and the path record), the pictures of the last report are removed.
    (run_copy / "iterations.tsv").unlink()
    (run_copy / "model.tsv").unlink()
    _edit_manifest(run_copy, fit=None)
    files = make_report(run_copy)
    assert {p.stem for p in files.figures} == {"manhattan", "qq", "score_histogram"}
    assert not (run_copy / "figures" / "lambda_path.png").exists()


def test_an_unfinished_run_is_refused(run_copy, tmp_path):
    with pytest.raises(ReportError, match="no such run folder"):
        build_report(tmp_path / "absent")
    (tmp_path / "empty").mkdir()
    with pytest.raises(ReportError, match=r"no manifest\.json"):
        build_report(tmp_path / "empty")
    _edit_manifest(run_copy, status="running")
    with pytest.raises(ReportError, match="not complete"):
        build_report(run_copy)
    with pytest.raises(ReportError, match="positive int"):
        make_report(run_copy, top=0)


def test_cli_report_prints_its_files(run_copy):
    res = runner.invoke(app, ["report", str(run_copy), "--top", "3"])
    assert res.exit_code == 0, res.output
    assert f"report: {run_copy / 'report.html'}" in res.output
    assert res.output.count("figure: ") == 3
    assert "lambda_GC = " in res.output


@pytest.mark.parametrize("case", ["absent", "no-manifest", "running"])
def test_cli_errors_are_one_line(run_copy, tmp_path, case):
    target = tmp_path / case
    if case == "no-manifest":
        target.mkdir()
    elif case == "running":
        target = run_copy
        _edit_manifest(run_copy, status="failed: killed")
    res = runner.invoke(app, ["report", str(target)])
    assert res.exit_code == 1
    lines = res.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ")
    assert "Traceback" not in res.output


def test_save_png_writes_atomically(tmp_path, rng):
    fig = manhattan_plot(np.arange(100.0), rng.exponential(0.4, 100), n_tested=100)
    path = save_png(fig, tmp_path / "sub" / "m.png")
    assert path.read_bytes()[:8] == PNG_SIGNATURE
    assert [p.name for p in path.parent.iterdir()] == ["m.png"]
