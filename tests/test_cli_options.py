"""Command-line conventions: flags, names, defaults, command order, and a one-line refusal for every
value out of range (checked before any work starts)."""

from __future__ import annotations

import io
import subprocess
import sys

import numpy as np
import pytest
from typer.testing import CliRunner

from widescreen.cli import app
from widescreen.cli._progress import LineProgress, RichProgress, format_bytes, progress_display

from .conftest import write_outcome, write_store

runner = CliRunner()
WIDE = {"COLUMNS": "200"}  # one help paragraph per line, so wrapping cannot split a phrase


def _flat(text: str) -> str:
    """Output with the panel borders and line breaks folded into single spaces."""
    for ch in "│╭╮╰╯─":
        text = text.replace(ch, " ")
    return " ".join(text.split())


SCREEN = ["screen", "s.zarr", "--outcome", "o.tsv", "--response", "y", "--out", "r"]
RUN = ["run", "s.zarr", "--outcome", "o.tsv", "--response", "y", "--out", "r"]

# (arguments, option named in the message, words of the message)
REFUSED = [
    (
        [*SCREEN, "--drop-missing", "1.5"],
        "--drop-missing",
        "missing rate is between 0 and 1; got 1.5",
    ),
    (
        [*SCREEN, "--drop-missing", "-1"],
        "--drop-missing",
        "missing rate is between 0 and 1; got -1",
    ),
    ([*RUN, "--drop-missing", "2"], "--drop-missing", "missing rate is between 0 and 1; got 2"),
    ([*SCREEN, "--drop-rare", "0.7"], "--drop-rare", "minor allele frequency is between 0 and 0.5"),
    ([*RUN, "--drop-rare", "-0.1"], "--drop-rare", "minor allele frequency is between 0 and 0.5"),
    ([*SCREEN, "--shortlist", "0"], "--shortlist", "positive integer or 'auto'; got '0'"),
    ([*RUN, "--shortlist", "-3"], "--shortlist", "positive integer or 'auto'; got '-3'"),
    ([*SCREEN, "--shortlist", "many"], "--shortlist", "positive integer or 'auto'; got 'many'"),
    ([*SCREEN, "--list", "0"], "--list", "at least 1; got 0"),
    ([*SCREEN, "--workers", "0"], "--workers", "at least 1; got 0"),
    ([*RUN, "--max-iter", "-1"], "--max-iter", "at least 0; got -1"),
    ([*RUN, "--permutations", "0"], "--permutations", "at least 1; got 0"),
    ([*RUN, "--alpha", "1.5"], "--alpha", "between 0 and 1 (exclusive); got 1.5"),
    ([*RUN, "--alpha", "0"], "--alpha", "between 0 and 1 (exclusive); got 0"),
    ([*RUN, "--seed", "-2"], "--seed", "at least 0; got -2"),
    ([*RUN, "--stability", "-1"], "--stability", "at least 0; got -1"),
    ([*RUN, "--stability-threshold", "0.5"], "--stability-threshold", "above 0.5 and at most 1"),
    ([*RUN, "--cv-folds", "1"], "--cv-folds", "0 (off) or at least 2; got 1"),
    (
        ["simulate", "x.zarr", "--family", "binary"],
        "--family",
        "one of linear, logistic, poisson, cox",
    ),
    (
        ["simulate", "x.zarr", "--design", "blocky"],
        "--design",
        "one of independent, equicorrelated",
    ),
    (["simulate", "x.zarr", "-n", "2"], "--samples", "at least 4; got 2"),
    (["simulate", "x.zarr", "-p", "0"], "--features", "at least 1; got 0"),
    (["simulate", "x.zarr", "--true", "-1"], "--true", "at least 0; got -1"),
    (["simulate", "x.zarr", "--rho", "1"], "--rho", "at least 0 and below 1; got 1"),
    (["simulate", "x.zarr", "--sigma", "0"], "--sigma", "must be positive; got 0"),
    (["simulate", "x.zarr", "--chunk-features", "0"], "--chunk-features", "at least 1; got 0"),
    (["import", "a.tsv", "s.zarr", "--dtype", "int16"], "--dtype", "one of float32, float64"),
    (
        ["import", "a.vcf", "s.zarr", "--vcf-values", "gp"],
        "--vcf-values",
        "one of gt, ds; got 'gp'",
    ),
    (["import", "a.vcf", "s.zarr", "--vcf-ids", "name"], "--vcf-ids", "one of column, position"),
    (
        ["import", "a.vcf", "s.zarr", "--multiallelic", "x"],
        "--multiallelic",
        "one of split, nonref",
    ),
    (["import", "a.tsv", "s.zarr", "--chunk-features", "-5"], "--chunk-features", "at least 1"),
    # A .npy array is (samples, features) of numbers: the text-only flags are refused, not ignored.
    (
        ["import", "a.npy", "s.zarr", "--features-as-rows"],
        "--features-as-rows",
        "applies to CSV/TSV files, not to a.npy",
    ),
    (
        ["import", "a.npy", "s.zarr", "--inf-as-missing"],
        "--inf-as-missing",
        "applies to CSV/TSV files, not to a.npy",
    ),
    (["inspect", "s.zarr", "--sample-blocks", "0"], "--sample-blocks", "at least 1; got 0"),
    (["report", "r", "--top", "0"], "--top", "at least 1; got 0"),
    (["demo", "-p", "3"], "--features", "at least 8; got 3"),
]


@pytest.mark.parametrize(
    ("args", "option", "message"), REFUSED, ids=[" ".join(c[0][-2:]) for c in REFUSED]
)
def test_values_out_of_range_are_refused_with_one_line(
    tmp_path, monkeypatch, args, option, message
):
    monkeypatch.chdir(tmp_path)
    res = runner.invoke(app, args, env=WIDE)
    out = _flat(res.output)
    assert res.exit_code == 2, res.output  # a usage error, before any work
    assert f"Invalid value for '{option}'" in out or f"'{option}'" in out, res.output
    assert message in out, res.output
    assert "a bug" not in out and "Traceback" not in res.output
    assert len(res.output.strip().splitlines()) == 1  # one line: "error: Invalid value for ..."
    assert list(tmp_path.iterdir()) == []  # nothing was written


def test_drop_rare_on_a_float_store_is_refused(tmp_path, rng):
    X = rng.standard_normal((30, 20)).astype(np.float32)
    ds = write_store(tmp_path / "s.zarr", X)
    write_outcome(tmp_path / "o.tsv", ds.sample_ids(), {"y": rng.standard_normal(30)})
    args = ["--outcome", str(tmp_path / "o.tsv"), "--response", "y", "--drop-rare", "0.01", "-q"]
    for cmd in ("screen", "run"):
        res = runner.invoke(app, [cmd, str(ds.path), *args, "--out", str(tmp_path / cmd)])
        assert res.exit_code == 1, res.output
        lines = [ln for ln in res.output.splitlines() if ln.strip()]
        assert len(lines) == 1 and lines[0].startswith("error: ")
        assert "--drop-rare" in lines[0] and "dosage" in lines[0] and "continuous" in lines[0]


def test_import_dtype_applies_to_npy_files_too(tmp_path):
    from widescreen.store import open_dataset

    x = np.arange(12, dtype=np.float64).reshape(3, 4)
    np.save(tmp_path / "x.npy", x)
    (tmp_path / "x.tsv").write_text("id\ta\tb\ns1\t1.5\t2\ns2\t3\t4\n")
    for src, extra, dtype in [
        ("x.npy", [], "float64"),  # the file's float64 is kept unless --dtype is given
        ("x.npy", ["--dtype", "float32"], "float32"),
        ("x.tsv", [], "float32"),
        ("x.tsv", ["--dtype", "float64"], "float64"),
    ]:
        out = tmp_path / f"{src}-{dtype}.zarr"
        res = runner.invoke(app, ["import", str(tmp_path / src), str(out), "-q", *extra])
        assert res.exit_code == 0, res.output
        ds = open_dataset(out)
        assert str(ds.dtype) == dtype, (src, extra)
        if src == "x.npy":
            np.testing.assert_array_equal(np.asarray(ds.X[:]), x.astype(dtype))


def test_flags_take_no_value_and_arguments_show_by_name():
    res = runner.invoke(app, ["screen", "--help"], env=WIDE)
    assert res.exit_code == 0
    assert "<bool>" not in res.output
    assert "Usage: widescreen screen [OPTIONS] STORE" in _flat(res.output).replace("root ", "")
    assert "{" not in res.output.split("\n\n")[0]
    # A flag given a value is refused: the value is taken as an extra argument.
    bad = runner.invoke(app, ["inspect", "s.zarr", "--sample-blocks", "2", "--quiet", "true"])
    assert bad.exit_code == 2


def test_defaults_are_shown_including_off():
    out = _flat(runner.invoke(app, ["run", "--help"], env=WIDE).output)
    assert "--shortlist N|auto" in out and "[default: auto]" in out
    for opt in ("--drop-rare FREQ", "--drop-missing RATE", "--covariates NAMES"):
        tail = out.split(opt, 1)[1]
        assert "[default: (off)]" in tail.split("--", 1)[0], opt
    assert "[default: scad]" in out and "[default: 0.05]" in out


def test_version_and_command_order():
    from widescreen import __version__

    res = runner.invoke(app, ["--version"])
    assert res.exit_code == 0 and res.output.strip() == f"widescreen {__version__}"
    out = runner.invoke(app, ["--help"], env=WIDE).output
    shown = [
        ln.split()[1] for ln in out.splitlines() if ln.startswith("│ ") and len(ln.split()) > 2
    ]
    order = [
        c
        for c in shown
        if c in {"import", "inspect", "simulate", "screen", "run", "report", "demo"}
    ]
    assert order == ["import", "inspect", "simulate", "screen", "run", "report", "demo"]


def test_demo_help_does_not_break_a_sentence():
    # In a terminal wide enough the paragraph is one line: no line break written into the text.
    out = runner.invoke(app, ["demo", "--help"], env={"COLUMNS": "400"}).output
    lines = [ln.strip() for ln in out.splitlines()]
    assert any("age and batch covariates, and 8 causal variants" in ln for ln in lines)
    out = runner.invoke(app, ["run", "--help"], env={"COLUMNS": "400"}).output
    assert any("ranking.tsv (the first screen's shortlist;" in ln for ln in out.splitlines())


def test_readme_names_every_option_of_every_command():
    import re
    from pathlib import Path

    import typer.main

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    # The README's code: fenced blocks, then inline spans of the rest.
    fenced = re.findall(r"^ *```.*?^ *```", readme, flags=re.S | re.M)
    prose = re.sub(r"^ *```.*?^ *```", "", readme, flags=re.S | re.M)
    code = "\n".join([*fenced, *re.findall(r"`[^`]+`", prose)])
    missing = []
    for name, command in typer.main.get_command(app).commands.items():
        for param in command.params:
            for opt in [*param.opts, *param.secondary_opts]:
                if not opt.startswith("--"):
                    continue
                if not re.search(re.escape(opt) + r"(?![\w-])", code):
                    missing.append(f"{name} {opt}")
    assert not missing, missing


def test_cli_import_loads_no_heavy_module():
    # Importing the command line (what `widescreen --help` does) must not pull in the numerical
    # stack: each command imports what it uses when it runs.
    heavy = ["dask", "distributed", "zarr", "matplotlib", "numba", "scipy", "sklearn", "numpy"]
    code = f"import sys, widescreen.cli\nprint(','.join(m for m in {heavy!r} if m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""


def test_workflow_import_leaves_fit_and_report_libraries_unloaded():
    # A resumed run reuses its passes and fits: scikit-learn (the refit's solver) and matplotlib
    # (the report) load only when a fit or a picture is made.
    heavy = ["sklearn", "matplotlib", "scipy.stats", "scipy.optimize"]
    code = (
        "import sys, widescreen.workflow._run, widescreen.workflow._screen\n"
        f"print(','.join(m for m in {heavy!r} if m in sys.modules))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""


def test_progress_without_a_terminal_writes_whole_lines():
    stream = io.StringIO()
    bar = progress_display("screen", stream=stream)
    assert isinstance(bar, LineProgress)
    bar.every = 0.0  # a line for every call
    for done in range(0, 41, 8):
        bar(done, 40)
    bar(40, 40)  # a repeated end writes nothing more
    text = stream.getvalue()
    assert "\r" not in text
    lines = text.splitlines()
    assert lines[0] == "screen: 0/40 blocks"
    assert lines[-1].startswith("screen: 40/40 blocks, done in ")
    assert len(lines) == 6 and all(ln.startswith("screen: ") for ln in lines)
    assert progress_display("screen", quiet=True, stream=stream) is None


def test_progress_in_bytes_for_a_small_file():
    stream = io.StringIO()
    bar = LineProgress("import", unit="bytes", stream=stream)
    bar(0, 4_000)
    bar(4_000, 4_000)
    text = stream.getvalue()
    assert "0/0" not in text and "of 3.91 KiB" in text
    assert format_bytes(950) == "950 B" and format_bytes(3 * 2**20) == "3 MiB"


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_progress_in_a_terminal_draws_a_rich_bar():
    stream = _Terminal()
    bar = progress_display("screen", stream=stream)
    assert isinstance(bar, RichProgress)
    for done in range(0, 11):
        bar(done, 10)
    assert "screen" in stream.getvalue() and "10/10" in stream.getvalue()
    assert not RichProgress._open  # finished bars give the terminal back
