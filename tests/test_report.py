"""The report of a run folder: PNG figures, the HTML page, the optional iterative parts, the command."""

from __future__ import annotations

import base64
import json
import re
import shutil

import matplotlib
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
    png_bytes,
    read_tsv,
    save_png,
)
from widescreen.schema import read_table
from widescreen.store import DatasetWriter
from widescreen.workflow import IterateConfig, ScreenConfig, run, screen

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
    tables = html[html.index('id="tables"') : html.index('id="details"')]
    assert f">{ranking['feature'][0]}<" in tables  # the top feature, in the table
    assert f">{ranking['feature'][4]}<" in tables and f">{ranking['feature'][5]}<" not in tables
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


@pytest.fixture(scope="module")
def iterative_run(study_run):
    """A finished run (screen, fits, conditional passes) on the same store, with a covariate."""
    root = study_run.parent
    rng = np.random.default_rng(8)
    g = zarr.open_group(root / "s.zarr", mode="r")
    ids = [str(s) for s in g["samples/id"][:]]
    X = g["X"][:, [40, 1200, 700]].astype(float)
    age = rng.normal(50, 10, len(ids))
    y = 0.9 * X[:, 0] - 0.8 * X[:, 1] + 0.6 * X[:, 2] + 0.02 * age + rng.normal(size=len(ids))
    write_outcome(root / "o2.tsv", ids, {"y": y.tolist(), "age": age.tolist()})
    cfg = IterateConfig(response="y", covariates=("age",), shortlist=10, max_iter=2)
    run(root / "s.zarr", root / "o2.tsv", cfg, root / "iterative")
    return root / "iterative"


def test_iterative_parts_come_from_the_records(iterative_run, tmp_path):
    folder = tmp_path / "it"
    shutil.copytree(iterative_run, folder)
    files = make_report(folder)
    names = {p.stem for p in files.figures}
    assert {"manhattan", "lambda_path", "selection_trace", "criterion"} <= names
    page = files.html.read_text()
    model = read_table(folder / "model.tsv")
    feats = model[model["term"] == "feature"]
    assert f"labelled with their ids: the {len(feats)} features of the selected model" in page
    # The summary leads: the selected features with coefficients and positions before any picture.
    summary = page[page.index('id="summary"') : page.index('id="pictures"')]
    for f, pos in zip(feats["feature"], feats["pos"], strict=True):
        assert f">{f}<" in summary and f">{pos}<" in summary
    assert "covariate:age" in summary
    man = json.loads((folder / "manifest.json").read_text())
    final = man["iterations"][-1]["model"]
    assert f"iteration {man['iterations'][-1]['iteration']}" in page or not final["path"]
    # Without the iterative records and tables, their pictures of the last report are removed.
    for f in ("iterations.tsv", "model.tsv", "entries.tsv"):
        (folder / f).unlink()
    man.pop("iterations")
    man.pop("model")
    (folder / "manifest.json").write_text(json.dumps(man))
    files = make_report(folder)
    assert {p.stem for p in files.figures} == {"manhattan", "qq", "score_histogram"}
    assert not (folder / "figures" / "lambda_path.png").exists()


def test_a_resumed_run_shows_each_session_and_their_total(study_run, tmp_path):
    root = study_run.parent
    cfg = ScreenConfig(response="y", shortlist=12)
    for _ in range(2):  # the second session resumes the finished run
        screen(root / "s.zarr", root / "o.tsv", cfg, tmp_path / "twice")
    man = json.loads((tmp_path / "twice" / "manifest.json").read_text())
    secs = [s["seconds"] for s in man["sessions"]]
    assert len(secs) == 2 and man["sessions"][1]["resumed"]
    page = build_report(tmp_path / "twice").read_text()
    total = sum(secs)
    assert f"2 sessions, 1 resumed; {total:.1f} s of work in total" in page
    runs = man["passes"]["screen"]["runs"]
    per = ", ".join(f"{r['session'] + 1}: {r['seconds']:.2f} s" for r in runs)
    assert f">{per}<" in page
    assert page.count("numpy ") == 1  # versions listed once


def test_manhattan_draws_one_line_when_bonferroni_meets_genome_wide(rng):
    # 0.05 / 1,000,000 = 5e-8: the Bonferroni level is the genome-wide level (common practice).
    fig = manhattan_plot(np.arange(50.0), rng.exponential(0.4, 50), n_tested=1_000_000)
    texts = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert len([t for t in texts if "Bonferroni" in t or "genome-wide" in t]) == 1
    assert any("Bonferroni" in t and "genome-wide" in t for t in texts)
    fig = manhattan_plot(np.arange(50.0), rng.exponential(0.4, 50), n_tested=1500)
    texts = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert len([t for t in texts if "Bonferroni" in t or "genome-wide" in t]) == 2


def test_feature_ids_are_plain_text_even_with_tex_on(rng):
    ids = np.array(["rs$1", "", "a_$b$_{c}", ""], dtype=object)
    with matplotlib.rc_context({"text.usetex": True}):
        fig = manhattan_plot(
            np.arange(4.0),
            np.array([9.0, 1.0, 8.0, 2.0]),
            n_tested=4,
            point_ids=ids,
            marked=np.array([True, False, True, False]),
        )
        data = png_bytes(fig)  # TeX would fail on these ids (and is not installed here)
    assert data[:8] == PNG_SIGNATURE
    shown = {t.get_text() for t in fig.axes[0].texts}
    assert shown == {"rs$1", "a_$b$_{c}"}


def test_picture_colours_differ_in_lightness():
    # Relative luminance (WCAG 2.1 definition): the categories of the Manhattan plot must stay
    # apart when printed in grey, beside their different marker shapes.
    from matplotlib.colors import to_rgb

    from widescreen.report import _plots

    def lum(c):
        rgb = np.array(to_rgb(c))
        lin = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
        return float(lin @ [0.2126, 0.7152, 0.0722])

    shades = sorted(lum(c) for c in (*_plots.CHROM_COLOURS, _plots.HIGHLIGHT, _plots.MODEL))
    assert min(np.diff(shades)) > 0.03


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
