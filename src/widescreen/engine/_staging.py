"""A run folder on object storage, worked on through a local copy.

``--out s3://bucket/runs/height`` runs exactly as a local run folder does, in a local copy of it (see
`local_copy_path`), while this module keeps the bucket in step:

1. **open**: take the folder's lease (`widescreen.engine.Lease`), then make the local copy equal the
   bucket's objects (download what differs, by size and MD5/ETag; remove local files the bucket does
   not hold, so a copy left by another run or machine never mixes in);
2. **while the run works**: every `PUSH_SECONDS` a background thread uploads what changed locally and
   removes what was removed locally;
3. **close**: a last upload (also after Ctrl-C or an error: what finished is kept), then the lease is
   released.

Why the bucket holds only whole, consistent checkpoints without an atomic rename: a PUT makes an
object whole or absent (S3 never shows part of one), and each upload sends files in an order that
keeps the run folder's rule "a block is finished only when its marker exists, written after its
statistics": markers removed locally are removed from the bucket first, then statistics, tables and
every other file are uploaded, then the block markers, then ``manifest.json`` last. A marker in the
bucket therefore always has its statistics there. Every step first checks that the lease is still
valid, so a process that lost it writes nothing more. A SIGKILL loses at most the blocks finished
since the last upload (they are recomputed on resume); the local copy keeps them, but the next open
trusts only the bucket.
"""

from __future__ import annotations

import hashlib
import os
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path

from ..schema import RunFolderError
from ..store import RemotePath, StoreError, check_conditional, is_url, place
from ._lease import LEASE_SECONDS, Lease, LeaseLost
from ._runfolder import RUN_FOLDER_ENTRIES, atomic_write, is_partial_file

#: Seconds between two uploads while a run works.
PUSH_SECONDS = 10.0
#: Bytes read into memory per batch of concurrent uploads or downloads.
BATCH_BYTES = 64 << 20
#: Local files of the copy that never go to the bucket (the local lock, the reserved bytes).
LOCAL_ONLY = frozenset({".lock", ".reserve"})
#: The lease object: never downloaded into the copy.
LEASE = ".lease"


def local_copy_path(url: str | RemotePath) -> Path:
    """Where the local copy of a run folder on object storage lives.

    ``$WIDESCREEN_CACHE_DIR`` (else ``$XDG_CACHE_HOME/widescreen``, else ``~/.cache/widescreen``),
    then ``runs/PROTOCOL/BUCKET/KEY``. With ``--scheduler``, the workers write their blocks there, so
    on a cluster ``WIDESCREEN_CACHE_DIR`` must name a folder the workers share.
    """
    where = place(str(url))
    base = os.environ.get("WIDESCREEN_CACHE_DIR")
    if not base:
        xdg = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
        base = os.path.join(xdg, "widescreen")
    return Path(base, "runs", where.protocol, *where.key.split("/"))


def _is_marker(rel: str) -> bool:
    parts = rel.split("/")
    return (
        len(parts) >= 4 and parts[0] == "passes" and parts[-2] == "done" and rel.endswith(".json")
    )


def _order(rel: str) -> int:
    """Upload order: everything else, then block markers, then the manifest."""
    if rel == "manifest.json":
        return 2
    return 1 if _is_marker(rel) else 0


def _md5(path: Path) -> str:
    h = hashlib.md5(usedforsecurity=False)
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


@dataclass
class StagedRun:
    """A run folder on object storage and its local copy, kept in step (see the module's text)."""

    remote: RemotePath
    local: Path
    lease_seconds: float = LEASE_SECONDS
    #: Seconds between uploads (`PUSH_SECONDS` when None).
    push_seconds: float | None = None
    lease: Lease = field(init=False)
    #: (size, mtime_ns, inode) of each local file as last uploaded or downloaded, by relative name.
    _sent: dict[str, tuple[int, int, int]] = field(default_factory=dict, init=False, repr=False)
    _error: BaseException | None = field(default=None, init=False, repr=False)
    _stop: threading.Event = field(default_factory=threading.Event, init=False, repr=False)
    _thread: threading.Thread | None = field(default=None, init=False, repr=False)
    _mutex: threading.Lock = field(default_factory=threading.Lock, init=False, repr=False)

    def __post_init__(self) -> None:
        self.lease = Lease(self.remote / LEASE, seconds=self.lease_seconds)

    # -- open and close -------------------------------------------------------------------------

    def open(self) -> Path:
        """Take the lease, bring the local copy in step, start the background uploads."""
        run_folder_target(self.remote)
        try:
            self.remote.check_bucket()
            self.lease.acquire()
        except StoreError as exc:
            raise RunFolderError(str(exc)) from None
        try:
            self.pull()
        except BaseException:
            self.lease.release()
            raise
        self._thread = threading.Thread(target=self._loop, name="widescreen-upload", daemon=True)
        self._thread.start()
        return self.local

    def close(self) -> None:
        """Stop the background uploads, upload what is left, release the lease.

        Raises a `RunFolderError` if the bucket could not be brought in step; the local copy then
        still holds every finished part of the run.
        """
        self._stop.set()
        if self._thread is not None:
            self._thread.join()
            self._thread = None
        try:
            if self._error is None:
                try:
                    self.push()
                except (OSError, StoreError, RunFolderError) as exc:
                    self._error = exc
        finally:
            self.lease.release()
        if self._error is not None:
            raise RunFolderError(
                f"{self.remote}: the results could not all be uploaded ({self._error}); they are "
                f"complete in the local copy {self.local}"
            ) from None

    def _loop(self) -> None:
        every = PUSH_SECONDS if self.push_seconds is None else self.push_seconds
        while not self._stop.wait(every):
            try:
                self.push()
            except (OSError, StoreError) as exc:  # the storage hiccupped: retried next time
                if not self.lease.valid():
                    self._error = exc
                    return
            except LeaseLost as exc:
                self._error = exc
                return

    # -- the two directions --------------------------------------------------------------------

    def _listing(self) -> dict[str, dict]:
        fs = self.remote.fs
        prefix = self.remote.key.rstrip("/") + "/"
        try:
            found = fs.find(self.remote.key, detail=True)
        except FileNotFoundError:
            return {}
        out = {}
        for key, info in found.items():
            key = key.strip("/")
            if key.startswith(prefix) and info.get("type", "file") == "file":
                rel = key[len(prefix) :]
                if rel != LEASE:
                    out[rel] = info
        return out

    def _local_files(self) -> dict[str, os.stat_result]:
        out = {}
        if not self.local.is_dir():
            return out
        for dirpath, _dirs, files in os.walk(self.local):
            for f in files:
                if is_partial_file(f):
                    continue
                path = Path(dirpath, f)
                rel = path.relative_to(self.local).as_posix()
                if rel in LOCAL_ONLY:
                    continue
                try:
                    out[rel] = path.stat()
                except FileNotFoundError:
                    continue  # replaced or removed while we looked
        return out

    def pull(self) -> int:
        """Make the local copy equal the bucket; return the number of files downloaded."""
        self.lease.check()
        remote = self._listing()
        self._refuse_foreign(remote)
        local = self._local_files()
        self.local.mkdir(parents=True, exist_ok=True)
        for rel in set(local) - set(remote):
            (self.local / rel).unlink(missing_ok=True)
        _remove_empty_folders(self.local)
        want = []
        for rel, info in remote.items():
            st = local.get(rel)
            tag = str(info.get("ETag", "")).strip('"')
            if st is not None and st.st_size == int(info["size"]) and _md5(self.local / rel) == tag:
                continue
            want.append(rel)
        fs = self.remote.fs
        for batch in _batches(want, lambda rel: int(remote[rel]["size"])):
            keys = [f"{self.remote.key}/{rel}" for rel in batch]
            got = fs.cat(keys, on_error="raise")
            got = got if isinstance(got, dict) else {keys[0]: got}
            for rel, key in zip(batch, keys, strict=True):
                atomic_write(self.local / rel, got[key], sync=False)
        self._sent = {rel: _key(st) for rel, st in self._local_files().items()}
        return len(want)

    def _refuse_foreign(self, remote: dict) -> None:
        """Refuse, before downloading anything, a prefix without a manifest that holds objects a run
        does not write (a store given as ``--out`` by mistake would otherwise be copied whole)."""
        if "manifest.json" in remote:
            return
        foreign = sorted({rel.split("/", 1)[0] for rel in remote} - RUN_FOLDER_ENTRIES)
        if foreign:
            shown = ", ".join(foreign[:5]) + (", ..." if len(foreign) > 5 else "")
            raise RunFolderError(
                f"{self.remote}: does not look like a run folder (it holds {shown}); choose another "
                "folder"
            )

    def push(self) -> int:
        """Upload what changed locally since the last exchange and remove what was removed, in the
        order of the module's text; return the number of files uploaded."""
        with self._mutex:
            local = self._local_files()
            gone = [rel for rel in self._sent if rel not in local]
            changed = [rel for rel, st in local.items() if self._sent.get(rel) != _key(st)]
            fs = self.remote.fs
            # Markers of removed blocks (a pass started over) go first, then the rest.
            for first in (True, False):
                doomed = [rel for rel in gone if _is_marker(rel) == first]
                if doomed:
                    self.lease.check()
                    fs.rm([f"{self.remote.key}/{rel}" for rel in doomed])
                    for rel in doomed:
                        self._sent.pop(rel, None)
            n = 0
            for stage in (0, 1, 2):
                todo = sorted(rel for rel in changed if _order(rel) == stage)
                for batch in _batches(todo, lambda rel: local[rel].st_size):
                    data = {}
                    stats = {}
                    for rel in batch:
                        path = self.local / rel
                        try:
                            stats[rel] = path.stat()
                            data[f"{self.remote.key}/{rel}"] = path.read_bytes()
                        except FileNotFoundError:
                            continue  # removed since the listing: the next push removes it remotely
                    if not data:
                        continue
                    self.lease.check()
                    fs.pipe(data)
                    for rel, st in stats.items():
                        self._sent[rel] = _key(st)
                    n += len(data)
            return n


def _remove_empty_folders(root: Path) -> None:
    """Remove the folders under ``root`` left empty (a folder that exists counts as content for a
    run folder's checks, so a copy of an emptied bucket must not keep them)."""
    for dirpath, _dirs, _files in os.walk(root, topdown=False):
        if Path(dirpath) != root and not os.listdir(dirpath):  # its empty children are gone now
            try:
                os.rmdir(dirpath)
            except OSError:
                pass  # filled meanwhile


def _key(st: os.stat_result) -> tuple[int, int, int]:
    return (st.st_size, st.st_mtime_ns, st.st_ino)


def _batches(items: list[str], size) -> Iterator[list[str]]:
    batch, total = [], 0
    for rel in items:
        batch.append(rel)
        total += size(rel)
        if total >= BATCH_BYTES:
            yield batch
            batch, total = [], 0
    if batch:
        yield batch


def run_folder_target(target) -> Path | RemotePath:
    """A run folder as given: a local `Path`, or a `RemotePath` on storage that can hold one.

    Refused with the reason: a read-only protocol, and one without conditional writes (its lease
    could not hold: `widescreen.store.check_conditional`).
    """
    if not is_url(str(target)):
        return Path(target)
    try:
        where = place(str(target))
        if where.read_only:
            raise StoreError(f"{where}: {where.protocol}:// is read-only; a run folder is written")
        check_conditional(where, "a run folder")
    except StoreError as exc:
        raise RunFolderError(str(exc)) from None
    return where


@contextmanager
def staged_run_folder(out, **options) -> Iterator[Path]:
    """The local folder to run in: ``out`` itself, or for a URL its local copy, kept in step with
    the bucket while the block runs (`StagedRun`).

    A trait's folder of a several-traits run (``RUN/traits/NAME``, whose screening pass lives in
    ``RUN``) is staged with its run: the lease and the copy are the whole run's, and the folder
    given is the trait's within the copy.
    """
    where = run_folder_target(out)
    if isinstance(where, Path):
        yield where
        return
    inside: tuple[str, ...] = ()
    if where.parent.name == "traits" and (where.parent.parent / "traits.tsv").is_file():
        where, inside = where.parent.parent, ("traits", where.name)
    staged = StagedRun(where, local_copy_path(where), **options)
    staged.open()
    try:
        yield staged.local.joinpath(*inside)
    finally:
        staged.close()


__all__ = [
    "PUSH_SECONDS",
    "StagedRun",
    "local_copy_path",
    "run_folder_target",
    "staged_run_folder",
]
