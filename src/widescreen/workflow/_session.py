"""A run session: lock the run folder, check it was made by the same command on the same data, record progress.

Re-running the same command on the same folder resumes; a different configuration or dataset is refused
with the differences spelt out, unless ``restart`` is asked for explicitly.
"""

from __future__ import annotations

import platform
import shutil
import time
from dataclasses import dataclass, field
from pathlib import Path

from .._version import __version__
from ..engine._runfolder import RunFolder, RunFolderError, RunLock, diff_config


def versions() -> dict[str, str]:
    import dask
    import numpy
    import scipy
    import sklearn
    import zarr

    return {
        "widescreen": __version__,
        "python": platform.python_version(),
        "numpy": numpy.__version__,
        "scipy": scipy.__version__,
        "dask": dask.__version__,
        "zarr": zarr.__version__,
        "scikit-learn": sklearn.__version__,
    }


@dataclass
class RunSession:
    """An open, locked run folder and its manifest (a plain dict, written atomically on every update)."""

    run: RunFolder
    lock: RunLock
    manifest: dict
    resumed: bool
    t0: float = field(default_factory=time.perf_counter)

    def save(self) -> None:
        self.run.write_manifest(self.manifest)

    def record_pass(self, name: str, summary: dict) -> None:
        passes = self.manifest.setdefault("passes", {})
        prev = passes.get(name, {})
        runs = prev.get("runs", [])
        runs.append(summary)
        passes[name] = {**summary, "runs": runs}
        self.save()

    def finish(self, status: str = "complete", **extra) -> None:
        self.manifest["status"] = status
        self.manifest.setdefault("timings", {})[
            f"session_{len(self.manifest.get('sessions', []))}"
        ] = round(time.perf_counter() - self.t0, 3)
        self.manifest.update(extra)
        self.save()

    def close(self) -> None:
        self.lock.release()

    def __enter__(self) -> RunSession:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is not None and exc_type is not KeyboardInterrupt:
            self.manifest["status"] = f"failed: {exc}"
            try:
                self.save()
            except OSError:
                pass
        elif exc_type is KeyboardInterrupt:
            self.manifest["status"] = "interrupted"
            self.save()
        self.close()


def open_session(
    out: str | Path,
    command: str,
    config: dict,
    dataset: dict,
    *,
    restart: bool = False,
) -> RunSession:
    """Lock ``out`` and check or create its manifest.

    Parameters
    ----------
    out : path of the run folder
    command : the workflow ("screen" or "run")
    config : the full configuration, as recorded
    dataset : {"path": ..., "fingerprint": ...} of the store
    restart : discard whatever the folder holds and start over
    """
    run = RunFolder(out)
    if run.path.exists() and not run.path.is_dir():
        raise RunFolderError(f"{run.path}: exists and is not a folder")
    lock = run.lock()
    lock.acquire()
    try:
        old = run.read_manifest()
        if old is not None and restart:
            for child in run.path.iterdir():
                if child.name == lock.path.name:
                    continue
                shutil.rmtree(child) if child.is_dir() else child.unlink()
            old = None
        elif old is None and any(p.name != lock.path.name for p in run.path.iterdir()):
            raise RunFolderError(
                f"{run.path}: holds files but no manifest.json; choose an empty folder or pass --restart"
            )
        if old is not None:
            problems = []
            if old.get("command") != command:
                problems.append(f"command: {old.get('command')!r} -> {command!r}")
            problems += diff_config(old.get("config", {}), config)
            if old.get("dataset", {}).get("fingerprint") != dataset["fingerprint"]:
                problems.append(
                    f"dataset: {old.get('dataset', {}).get('path')} changed or is another store "
                    f"(fingerprint {old.get('dataset', {}).get('fingerprint')} -> {dataset['fingerprint']})"
                )
            if problems:
                raise RunFolderError(
                    f"{run.path}: made by another configuration; differences: "
                    + "; ".join(problems)
                    + ". Use another folder, or --restart to start over."
                )
            manifest = old
            manifest.setdefault("sessions", []).append({"started": time.time(), "resumed": True})
            manifest["status"] = "running"
            resumed = True
        else:
            manifest = {
                "command": command,
                "config": config,
                "dataset": dataset,
                "versions": versions(),
                "status": "running",
                "sessions": [{"started": time.time(), "resumed": False}],
            }
            resumed = False
        session = RunSession(run=run, lock=lock, manifest=manifest, resumed=resumed)
        session.save()
        return session
    except BaseException:
        lock.release()
        raise
