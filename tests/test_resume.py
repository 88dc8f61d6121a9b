"""Checkpoints and resume: a screen killed with SIGKILL and run again equals an uninterrupted one.

The screen runs in a subprocess through the command line; the test watches the pass's completion
markers appear and kills the process at chosen points. The store has many small chunks so the pass
lasts a couple of seconds.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import scipy.stats as st

from widescreen.engine import RunFolder, RunFolderError, read_stats
from widescreen.report import read_tsv
from widescreen.simulate import SimulationConfig, simulate
from widescreen.workflow import ScreenConfig, screen
from widescreen.workflow._session import open_session

pytestmark = pytest.mark.slow

CLI = [sys.executable, "-c", "from widescreen.cli import main; main()"]
N_BLOCKS = 300  # 4800 features in chunks of 16


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    root = tmp_path_factory.mktemp("resume")
    cfg = SimulationConfig(
        design="dosage", n_samples=150, n_features=4800, chunk_features=16, seed=3
    )
    sim = simulate(root / "x.zarr", cfg)
    ref = root / "ref"
    screen(sim.dataset.path, sim.outcome_path, _config(), ref)
    return root, sim, ref


def _config() -> ScreenConfig:
    return ScreenConfig(response="y", covariates=("age", "batch"))


def _args(sim, out: Path, *extra: str) -> list[str]:
    return [
        *CLI,
        "screen",
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
        *extra,
    ]


def _markers(out: Path) -> int:
    d = out / "passes" / "screen" / "done"
    return len(list(d.glob("*.json"))) if d.is_dir() else 0


def _start_and_kill(sim, out: Path, at: int, timeout: float = 60.0) -> int:
    """Run the screen in a subprocess, SIGKILL it once ``at`` markers exist; return markers left."""
    proc = subprocess.Popen(_args(sim, out), stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    t0 = time.monotonic()
    try:
        while _markers(out) < at:
            if proc.poll() is not None:
                pytest.fail(f"the screen ended before {at} blocks: {proc.stderr.read().decode()}")
            if time.monotonic() - t0 > timeout:
                pytest.fail("the screen made no progress")
            time.sleep(0.002)
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stdout.close()
        proc.stderr.close()
    return _markers(out)


def _bits(a: np.ndarray) -> np.ndarray:
    return np.ascontiguousarray(a, dtype=np.float64).view(np.uint64)


def _assert_same_run(out: Path, ref: Path) -> None:
    assert (out / "ranking.tsv").read_bytes() == (ref / "ranking.tsv").read_bytes()
    got, want = read_stats(RunFolder(out), "screen"), read_stats(RunFolder(ref), "screen")
    assert set(got) == set(want)
    for c in want:
        np.testing.assert_array_equal(_bits(got[c]), _bits(want[c]), err_msg=c)


def test_reference_ranking_is_the_partial_correlation(study):
    _root, sim, ref = study
    # Ranking = |partial correlation of x_j and y given age and batch| (Fan & Lv 2008 utility; the
    # partial correlation computed here from numpy residuals and scipy.stats.pearsonr).
    ranking = read_tsv(ref / "ranking.tsv")
    table = read_tsv(sim.outcome_path)
    # the outcome table's rows are shuffled: align them with the store's samples by id
    pos = {s: i for i, s in enumerate(table["sample"])}
    order = np.array([pos[s] for s in sim.dataset.sample_ids()])
    table = {k: v[order] for k, v in table.items()}
    y = table["y"].astype(float)
    Z = np.column_stack([np.ones(y.size), table["age"].astype(float), table["batch"].astype(float)])
    ds = sim.dataset
    idx = ranking["index"].astype(int)[:5]
    x = np.asarray(ds.X[:, :])[:, idx].astype(float)
    miss = np.asarray(ds.X[:, :])[:, idx] == -128
    x[miss] = np.nan
    x = np.where(miss, np.nanmean(x, axis=0), x)

    def resid(v):
        return v - Z @ np.linalg.lstsq(Z, v, rcond=None)[0]

    for j in range(idx.size):
        r = st.pearsonr(resid(x[:, j]), resid(y))[0]
        assert float(ranking["correlation"][j]) == pytest.approx(r, abs=1e-8)


@pytest.mark.parametrize("at", [1, N_BLOCKS // 2, N_BLOCKS - 20])
def test_killed_screen_resumes_bit_identical(study, at):
    root, sim, ref = study
    out = root / f"killed-{at}"
    left = _start_and_kill(sim, out, at)
    assert left >= at
    man = json.loads((out / "manifest.json").read_text())
    assert man["status"] == "running"  # nothing claims to be complete
    if left < N_BLOCKS:
        assert not (out / "ranking.tsv").exists()
    # The same screen again resumes.
    res = screen(sim.dataset.path, sim.outcome_path, _config(), out)
    assert (res.pass_result.blocks_reused, res.pass_result.blocks_computed) == (
        left,
        N_BLOCKS - left,
    )
    _assert_same_run(out, ref)
    man = json.loads((out / "manifest.json").read_text())
    assert man["status"] == "complete"
    runs = man["passes"]["screen"]["runs"]
    assert runs[-1]["blocks_reused"] == left
    assert runs[-1]["blocks_computed"] == N_BLOCKS - left
    assert runs[-1]["session"] == 1
    sessions = man["sessions"]
    assert [s["status"] for s in sessions] == ["interrupted", "complete"]
    assert sessions[1]["resumed"] is True


def test_finished_run_is_reused_whole(study, tmp_path):
    _root, sim, ref = study
    out = tmp_path / "again"
    shutil.copytree(ref, out)
    res = screen(sim.dataset.path, sim.outcome_path, _config(), out)
    assert (res.pass_result.blocks_reused, res.pass_result.blocks_computed) == (N_BLOCKS, 0)
    _assert_same_run(out, ref)
    man = json.loads((out / "manifest.json").read_text())
    assert [r["blocks_computed"] for r in man["passes"]["screen"]["runs"]] == [N_BLOCKS, 0]
    assert all(r["seconds"] >= 0 for r in man["passes"]["screen"]["runs"])


def test_config_change_is_refused(study, tmp_path):
    _root, sim, ref = study
    out = tmp_path / "cfg"
    shutil.copytree(ref, out)
    other = ScreenConfig(response="y", covariates=("age",), drop_missing=0.1)
    with pytest.raises(RunFolderError) as err:
        screen(sim.dataset.path, sim.outcome_path, other, out)
    msg = str(err.value)
    assert "drop_missing: None -> 0.1" in msg
    assert "covariates: ['age', 'batch'] -> ['age']" in msg
    assert "--restart" in msg
    # the refused run changed nothing
    assert (out / "ranking.tsv").read_bytes() == (ref / "ranking.tsv").read_bytes()
    assert json.loads((out / "manifest.json").read_text())["status"] == "complete"
    # and --restart starts over with the new configuration
    res = screen(sim.dataset.path, sim.outcome_path, other, out, restart=True)
    assert res.pass_result.blocks_reused == 0


def test_dataset_change_is_refused(tmp_path):
    cfg = SimulationConfig(design="dosage", n_samples=60, n_features=300, chunk_features=64)
    sim = simulate(tmp_path / "x.zarr", cfg)
    out = tmp_path / "run"
    screen(sim.dataset.path, sim.outcome_path, _config(), out)
    # rewrite the store in place (same shape and ids, other values)
    simulate(tmp_path / "x.zarr", SimulationConfig(**{**cfg.to_dict(), "seed": 9}), overwrite=True)
    with pytest.raises(RunFolderError, match=r"dataset: .*x\.zarr changed or is another store"):
        screen(sim.dataset.path, sim.outcome_path, _config(), out)


def test_concurrent_run_is_refused_and_a_killed_holder_frees_the_folder(study, tmp_path):
    _root, sim, ref = study
    out = tmp_path / "busy"
    proc = subprocess.Popen(_args(sim, out), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    try:
        t0 = time.monotonic()
        while _markers(out) < 5:
            assert proc.poll() is None, proc.stderr.read().decode()
            assert time.monotonic() - t0 < 60
            time.sleep(0.002)
        # Stopped mid-pass, the first process still holds the folder while a second one starts.
        proc.send_signal(signal.SIGSTOP)
        second = subprocess.run(_args(sim, out), capture_output=True, text=True, timeout=60)
        assert second.returncode == 1
        assert f"in use by pid {proc.pid}" in second.stderr
        with pytest.raises(RunFolderError, match=f"in use by pid {proc.pid}"):
            open_session(out, "screen", _config().to_dict(), {"fingerprint": "x"})
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stderr.close()
    # the killed holder left its lock file behind, but the folder is not stuck
    assert (out / ".lock").exists()
    res = screen(sim.dataset.path, sim.outcome_path, _config(), out)
    assert res.pass_result.blocks_reused >= 5
    _assert_same_run(out, ref)
    assert not (out / ".lock").exists()
    man = json.loads((out / "manifest.json").read_text())
    assert [s["status"] for s in man["sessions"]] == ["interrupted", "complete"]


def test_lock_in_one_process(tmp_path):
    run = RunFolder(tmp_path / "run")
    a = run.lock()
    a.acquire()
    b = run.lock()
    with pytest.raises(RunFolderError, match=f"in use by pid {os.getpid()}"):
        b.acquire()
    a.release()
    b.acquire()  # free again once released
    b.release()
    # a lock file of a process that is gone (no flock held on it) does not block
    (tmp_path / "run" / ".lock").write_text(json.dumps({"pid": 999999999, "host": "h"}))
    with run.lock():
        pass
