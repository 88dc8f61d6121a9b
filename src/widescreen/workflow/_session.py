"""A run session: lock the run folder, check it was made by the same command on the same data, record progress.

Re-running the same command on the same folder resumes; a different configuration or dataset is refused
with the differences spelt out, unless ``restart`` is asked for explicitly. Two processes cannot work on
one folder at once (the second is refused, naming the holder); a killed holder leaves no stale lock.

The manifest keeps one entry per session under ``sessions`` (start, end, status, versions, wall time;
a session that was killed is marked ``interrupted`` by the next one) and, per pass, the summary of each
session's run of it under ``passes.NAME.runs`` (``blocks_reused``, ``blocks_computed``, timings), tagged
with the session's number.
"""

from __future__ import annotations

import os
import platform
import socket
import time
from dataclasses import dataclass, field
from pathlib import Path

from .._version import __version__
from ..engine import (
    RESERVE_BYTES,
    RunFolder,
    RunFolderError,
    RunLock,
    StagedRun,
    diff_config,
    local_copy_path,
    remove_partial_files,
    run_folder_target,
)


def _check_restartable(run: RunFolder) -> None:
    """``--restart`` empties only what is recognisably a run folder: one whose manifest names a
    command, or that holds nothing a run does not write. Anything else is refused untouched."""
    try:
        manifest = run.read_manifest()
    except RunFolderError:
        manifest = None  # unreadable: judged by its other entries
    if isinstance(manifest, dict) and "command" in manifest and "sessions" in manifest:
        return
    foreign = run.foreign_entries()
    if foreign:
        shown = ", ".join(foreign[:5]) + (", ..." if len(foreign) > 5 else "")
        raise RunFolderError(
            f"{run.path}: does not look like a run folder (it holds {shown}); --restart empties "
            "only run folders: choose another folder"
        )


def _outcome_changes(old: dict | None, new: dict | None) -> list[str]:
    """What changed in the outcome table's analysed samples and columns (runs recorded before this
    was kept have no record: nothing to compare)."""
    if not old or not new:
        return []
    out = []
    for key in sorted(set(old) | set(new)):
        if key == "path" or old.get(key) == new.get(key):
            continue
        if key == "samples":
            out.append("outcome table: the analysed samples changed")
        elif key not in old or key not in new:
            out.append(
                f"outcome table: {key[len('column ') :]} {'added' if key in new else 'dropped'}"
            )
        else:
            out.append(f"outcome table: the values of {key} changed")
    if out and old.get("path") != new.get("path"):
        out.insert(0, f"outcome table: {old.get('path')} -> {new.get('path')}")
    return out


def _mark_not_running(path: Path) -> None:
    """Last resort when the final manifest cannot be saved: rewrite the status in place.

    "stopped" has the length of "running", so the file keeps its size (no new bytes are needed on a
    full disk), and every other record stays.
    """
    try:
        text = path.read_bytes()
        old = b'"status": "running"'
        if old in text:
            new = b'"status": "stopped"'
            with open(path, "r+b") as f:
                f.write(text.replace(old, new))
    except OSError:
        pass


def versions() -> dict[str, str]:
    from importlib.metadata import version

    import dask
    import numpy
    import scipy
    import zarr

    return {
        "widescreen": __version__,
        "python": platform.python_version(),
        "numpy": numpy.__version__,
        "scipy": scipy.__version__,
        "dask": dask.__version__,
        "zarr": zarr.__version__,
        # From the metadata: importing scikit-learn costs a second, and `screen` does not use it.
        "scikit-learn": version("scikit-learn"),
    }


def _session_entry(*, resumed: bool) -> dict:
    return {
        "started": time.time(),
        "resumed": resumed,
        "pid": os.getpid(),
        "host": socket.gethostname(),
        "versions": versions(),
    }


@dataclass
class RunSession:
    """An open, locked run folder and its manifest (a plain dict, written atomically on every update)."""

    run: RunFolder
    lock: RunLock
    manifest: dict
    resumed: bool
    t0: float = field(default_factory=time.perf_counter)
    #: For a run folder on object storage: the bucket side of the local copy this session works in.
    staged: StagedRun | None = None

    def save(self) -> None:
        self.run.write_manifest(self.manifest)

    @property
    def session_index(self) -> int:
        """Number of this session in ``manifest["sessions"]`` (0 for the first)."""
        return len(self.manifest.get("sessions", [])) - 1

    def record_pass(self, name: str, summary: dict) -> None:
        """Record one finished pass of this session: the latest summary, and this run in ``runs``."""
        passes = self.manifest.setdefault("passes", {})
        prev = passes.get(name, {})
        runs = list(prev.get("runs", []))
        run = {**summary, "session": self.session_index}
        runs.append(run)
        passes[name] = {**run, "runs": runs}
        self.save()

    def _end_session(self, status: str) -> None:
        sessions = self.manifest.get("sessions", [])
        if sessions:
            sessions[-1].update(
                ended=time.time(),
                status=status,
                seconds=round(time.perf_counter() - self.t0, 3),
            )

    def finish(self, status: str = "complete", **extra) -> None:
        self.manifest["status"] = status
        self.manifest.setdefault("timings", {})[f"session_{self.session_index + 1}"] = round(
            time.perf_counter() - self.t0, 3
        )
        self._end_session(status)
        self.manifest.update(extra)
        self.save()

    def close(self) -> None:
        self.run.release_reserve()
        self.lock.release()
        if self.staged is not None:
            staged, self.staged = self.staged, None
            staged.close()  # the last upload, then the lease is released

    def __enter__(self) -> RunSession:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        try:
            if exc_type is not None:
                status = "interrupted" if exc_type is KeyboardInterrupt else f"failed: {exc}"
                self.manifest["status"] = status
                self._end_session(status)
                self._save_last()
        finally:
            self.close()

    def _save_last(self) -> None:
        """Save the final status, using the reserved bytes when the disk is full; if even that fails,
        remove the manifest's "running" status on disk rather than leave it claiming a live run."""
        try:
            self.save()
            return
        except OSError:
            pass
        if self.run.release_reserve():
            try:
                self.save()
                return
            except OSError:
                pass
        _mark_not_running(self.run.manifest_path)


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
    out : path of the run folder, or its URL on object storage (s3://...): the session then works
        in a local copy kept in step with the bucket (`widescreen.engine.StagedRun`)
    command : the workflow ("screen" or "run")
    config : the full configuration, as recorded
    dataset : {"path": ..., "fingerprint": ...} of the store
    restart : discard whatever the folder holds and start over
    """
    staged = None
    where = run_folder_target(out)
    if not isinstance(where, Path):
        staged = StagedRun(where, local_copy_path(where))
        out = staged.open()
    try:
        session = _open_local(out, command, config, dataset, restart=restart)
    except BaseException:
        if staged is not None:
            staged.close()
        raise
    session.staged = staged
    return session


def _open_local(out, command: str, config: dict, dataset: dict, *, restart: bool) -> RunSession:
    run = RunFolder(out)
    if run.path.exists() and not run.path.is_dir():
        raise RunFolderError(f"{run.path}: exists and is not a folder")
    if restart and run.path.is_dir():
        _check_restartable(run)  # before the lock file is made, so a refusal leaves no trace
    try:
        lock = run.lock()
    except OSError as exc:
        raise RunFolderError(f"{run.path}: cannot create the run folder: {exc.strerror}") from None
    lock.acquire()
    try:
        # We hold the lock: no writer is alive, so temporary files are leftovers of a killed one.
        remove_partial_files(run.path)
        if restart:
            run.clear()
            old = None
        else:
            old = run.read_manifest()
        if old is None and run.holds_results():
            foreign = run.foreign_entries()
            hint = (
                "choose an empty folder"
                if foreign
                else "choose an empty folder or pass --restart to start over"
            )
            raise RunFolderError(f"{run.path}: holds files but no manifest.json; {hint}")
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
            problems += _outcome_changes(
                old.get("dataset", {}).get("outcome"), dataset.get("outcome")
            )
            if problems:
                raise RunFolderError(
                    f"{run.path}: was made by another command, configuration or dataset; differences: "
                    + "; ".join(problems)
                    + ". Use another folder, or --restart to start over."
                )
            manifest = old
            sessions = manifest.setdefault("sessions", [])
            for prev in sessions:
                # We hold the lock, so a session that never recorded its end was killed.
                prev.setdefault("status", "interrupted")
            sessions.append(_session_entry(resumed=True))
            manifest["status"] = "running"
            resumed = True
        else:
            manifest = {
                "command": command,
                "config": config,
                "dataset": dataset,
                "versions": versions(),
                "status": "running",
                "sessions": [_session_entry(resumed=False)],
            }
            resumed = False
        session = RunSession(run=run, lock=lock, manifest=manifest, resumed=resumed)
        session.save()
        run.reserve(max(RESERVE_BYTES, 4 * run.manifest_path.stat().st_size))
        return session
    except BaseException:
        lock.release()
        raise
