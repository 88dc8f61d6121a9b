"""Fault injection: `screen` and `run` killed with SIGKILL, SIGTERM or SIGINT at random points and run
again give every table and statistics file byte for byte as an uninterrupted run (timing columns
aside), and an interrupt prints one line, not library noise.

The kill points are drawn from a seeded generator: a random fraction of a random pass's blocks, the
start-up (before or during the first manifest write) and the end (refits, tables). Each trial runs the
command in a subprocess, signals it once its point is reached, then resumes in-process (faster) and
compares. Sized for CI: a store of 150 blocks, about a dozen trials.
"""

from __future__ import annotations

import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from widescreen.cli import app
from widescreen.simulate import SimulationConfig, simulate

pytestmark = pytest.mark.slow

CLI = [sys.executable, "-c", "from widescreen.cli import main; main()"]
TIMING_COLUMNS = ("pass_seconds", "fit_seconds")
TABLES = ("ranking.tsv", "model.tsv", "iterations.tsv")
N_BLOCKS = 100  # 1600 features in chunks of 16
SIGNALS = (signal.SIGKILL, signal.SIGTERM, signal.SIGINT)
runner = CliRunner()


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    root = tmp_path_factory.mktemp("faults")
    cfg = SimulationConfig(
        design="dosage",
        n_samples=200,
        n_features=1600,
        n_true=6,
        sigma=0.5,
        chunk_features=16,
        seed=5,
    )
    sim = simulate(root / "x.zarr", cfg)
    refs = {}
    for command in ("screen", "run"):
        ref = root / f"ref-{command}"
        res = runner.invoke(app, _args(command, sim, ref))
        assert res.exit_code == 0, res.output
        refs[command] = ref
    # the run must iterate, so that conditional passes are among the kill points
    assert (refs["run"] / "passes" / "iter1").is_dir()
    return root, sim, refs


def _args(command: str, sim, out: Path, report: bool = False) -> list[str]:
    return [
        command,
        str(sim.dataset.path),
        "--outcome",
        str(sim.outcome_path),
        "--response",
        "y",
        "--covariates",
        "age,batch",
        "--out",
        str(out),
        "--quiet",
        "--report" if report else "--no-report",
    ]


def _markers(out: Path, pass_name: str) -> int:
    d = out / "passes" / pass_name / "done"
    return len(list(d.glob("*.json"))) if d.is_dir() else 0


def _reached(out: Path, point: tuple) -> bool:
    kind = point[0]
    if kind == "pass":
        _, name, at = point
        return _markers(out, name) >= at
    if kind == "file":  # a file of the run folder exists (ranking.tsv: the report is next)
        return (out / point[1]).exists()
    if kind == "end":  # every pass done: refit, tables
        return (out / "passes" / point[1] / "done").is_dir() and _markers(out, point[1]) >= N_BLOCKS
    return False


def _interrupt(
    command: str, sim, out: Path, sig: int, point: tuple, report: bool = False
) -> subprocess.CompletedProcess:
    """Start ``command`` in a subprocess and send ``sig`` once ``point`` is reached."""
    proc = subprocess.Popen(
        [*CLI, *_args(command, sim, out, report)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    t0 = time.monotonic()
    try:
        if point[0] == "time":
            deadline = t0 + point[1]
            while time.monotonic() < deadline and proc.poll() is None:
                time.sleep(0.005)
        else:
            while not _reached(out, point) and proc.poll() is None:
                assert time.monotonic() - t0 < 300, "no progress"
                time.sleep(0.002)
        if proc.poll() is None:
            proc.send_signal(sig)
        stdout, stderr = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    return subprocess.CompletedProcess(proc.args, proc.returncode, stdout, stderr)


def _table_without_timing(path: Path) -> list[list[str]]:
    rows = [line.split("\t") for line in path.read_text().splitlines()]
    keep = [i for i, c in enumerate(rows[0]) if c not in TIMING_COLUMNS]
    return [[r[i] for i in keep] for r in rows]


def _stats_files(out: Path) -> dict[str, bytes]:
    return {
        str(p.relative_to(out)): p.read_bytes()
        for p in sorted((out / "passes").glob("*/stats/*/c/*"))
    }


def assert_same_outputs(out: Path, ref: Path) -> None:
    """Every table (timing columns aside) and every statistics chunk file equal byte for byte."""
    for name in TABLES:
        if (ref / name).exists():
            assert (out / name).exists(), name
            assert _table_without_timing(out / name) == _table_without_timing(ref / name), name
    got, want = _stats_files(out), _stats_files(ref)
    assert sorted(got) == sorted(want)
    differ = [k for k in want if got[k] != want[k]]
    assert not differ, f"statistics files differ: {differ[:5]}"


def _trials() -> list[tuple[str, int, tuple]]:
    """The kill points, drawn once from a fixed seed (so a failure can be rerun)."""
    rng = np.random.default_rng(20261203)
    out = []
    for sig in SIGNALS:
        out.append(("screen", sig, ("pass", "screen", int(rng.integers(1, N_BLOCKS)))))
        out.append(("run", sig, ("pass", "iter1", int(rng.integers(1, N_BLOCKS)))))
        extra = rng.choice(["start", "screen", "end"])
        if extra == "start":
            out.append(("run", sig, ("time", float(rng.uniform(0.5, 4.0)))))
        elif extra == "screen":
            out.append(("run", sig, ("pass", "screen", int(rng.integers(1, N_BLOCKS)))))
        else:
            out.append(("run", sig, ("end", "iter1")))
    return out


def test_interrupt_during_the_report_ends_cleanly(study):
    """Ctrl-C while the report draws (matplotlib loading, figures): one line, exit 130, no abort."""
    root, sim, refs = study
    out = root / "report-SIGINT"
    done = _interrupt("screen", sim, out, signal.SIGINT, ("file", "ranking.tsv"), report=True)
    assert done.returncode in (0, 130), done.stderr  # 0: the report finished first
    if done.returncode == 130:
        lines = [x for x in done.stderr.splitlines() if x.strip()]
        assert len(lines) == 1 and lines[0].startswith("interrupted"), done.stderr
    assert not list(out.glob(".*.tmp-*")) and not list((out / "figures").glob(".*.tmp-*"))
    res = runner.invoke(app, _args("screen", sim, out, report=True))
    assert res.exit_code == 0, res.output
    assert_same_outputs(out, refs["screen"])
    assert (out / "report.html").exists()


@pytest.mark.parametrize(
    ("command", "sig", "point"),
    _trials(),
    ids=lambda v: v.name if isinstance(v, signal.Signals) else str(v),
)
def test_interrupted_and_resumed_equals_uninterrupted(study, command, sig, point):
    root, sim, refs = study
    out = root / f"{command}-{sig.name}-{'-'.join(map(str, point))}"
    done = _interrupt(command, sim, out, sig, point)
    if point[0] == "pass":  # signalled mid-pass: it cannot have finished
        assert done.returncode != 0, done.stdout
    if done.returncode != 0:  # stopped (an early "time" or an "end" point may come too late)
        if sig == signal.SIGKILL or (point[0] == "time" and done.returncode == -sig):
            # killed, or stopped before the command installed its handler (while Python started)
            assert done.returncode == -sig
        else:
            # stopped like Ctrl-C: exit 130, one line, none of the libraries' noise
            assert done.returncode == 130, done.stderr
            lines = [x for x in done.stderr.splitlines() if x.strip()]
            assert len(lines) == 1 and lines[0].startswith("interrupted"), done.stderr
        for name in TABLES:
            # nothing complete-looking unless the command got that far
            if (out / name).exists():
                assert point[0] == "end" or name == "ranking.tsv"
    res = runner.invoke(app, _args(command, sim, out))
    assert res.exit_code == 0, res.output
    assert_same_outputs(out, refs[command])
