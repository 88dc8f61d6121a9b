"""Pieces shared by the importers: the error type, id checks, input files and raw matrix reads."""

from __future__ import annotations

import gzip
import os
import queue
import tempfile
import threading
import zlib
from collections.abc import Callable

import numpy as np

from ._format import (
    MAX_SAMPLES_PER_CHUNK,
    FeatureIdError,
    StoreError,
    default_chunks,
    describe_unsafe,
    unsafe_id,
)

Progress = Callable[[int, int], None] | None


class IngestError(StoreError):
    """An input file cannot be imported: what is wrong and where (file, line, column)."""


def decode_utf8(data: bytes, where: str, sep: bytes | None = None) -> str:
    """Decode UTF-8 text, or raise `IngestError` naming ``where`` and the offending byte.

    With ``sep`` (the field separator), the message names the 1-based field of the bad byte too.
    """
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as exc:
        byte = data[exc.start]
        field = f", column {data[: exc.start].count(sep) + 1}" if sep else ""
        raise IngestError(
            f"{where}{field}: not UTF-8 text (byte 0x{byte:02x} at character {exc.start + 1} of "
            "the line); save the file as UTF-8"
        ) from None


def check_unique(ids: np.ndarray, where_fn: Callable[[int], str], src: str, what: str) -> None:
    """Raise `IngestError` naming the first id that would break the outputs (a tab, newline,
    carriage return or NUL in it) or the first duplicated id and both of its positions."""
    bad = unsafe_id(ids)
    if bad is not None:
        raise IngestError(
            f"{src}: {where_fn(bad)}: {what} id {str(ids[bad])!r} holds "
            f"{describe_unsafe(str(ids[bad]))}, which would break the output tables"
        )
    if ids.size < 2:
        return
    order = np.argsort(ids, kind="stable")
    srt = ids[order]
    dup = np.flatnonzero(srt[1:] == srt[:-1])
    if dup.size:
        # Among all duplicated pairs report the one whose second occurrence comes first in the file.
        second = order[dup + 1]
        k = int(np.argmin(second))
        i, j = int(order[dup[k]]), int(second[k])
        raise IngestError(
            f"{src}: duplicate {what} id {str(ids[j])!r} at {where_fn(i)} and {where_fn(j)}"
        )


class LineLog:
    """The input line (or any int64 label) of every feature, spilled to a temporary file.

    Importers name lines in their messages about feature ids; holding one int64 per feature would
    grow with p, so the labels go to disk as they come and are read back by position for a message.
    """

    def __init__(self, near: str | os.PathLike) -> None:
        folder = os.path.dirname(os.path.abspath(os.fspath(near))) or "."
        # Beside the store when it is a local folder; a store URL (object storage) has no local
        # folder, so the system's temporary directory then.
        local = "://" not in os.fspath(near) and os.path.isdir(folder)
        self.file = tempfile.TemporaryFile(dir=folder if local else None, prefix=".ingest-lines-")
        self.n = 0

    def add(self, labels) -> None:
        labels = np.asarray(labels, dtype=np.int64)
        self.file.write(memoryview(np.ascontiguousarray(labels)).cast("B"))
        self.n += labels.size

    def at(self, i: int) -> int:
        """The label of feature ``i`` (0-based)."""
        self.file.flush()
        out = np.empty(1, dtype=np.int64)
        _pread_exact(self.file.fileno(), out, 8 * int(i))
        return int(out[0])

    def close(self) -> None:
        self.file.close()


def id_error(exc: FeatureIdError, where_fn: Callable[[int], str], src: str) -> StoreError:
    """A writer's refused feature id as an importer says it: the file and the lines of the id.

    Messages as `check_unique` words them; a refused chromosome keeps the writer's message.
    """
    if exc.kind == "duplicate":
        i, j = exc.positions
        return IngestError(
            f"{src}: duplicate feature id {exc.value!r} at {where_fn(i)} and {where_fn(j)}"
        )
    if exc.kind == "unsafe":
        return IngestError(
            f"{src}: {where_fn(exc.positions[0])}: feature id {exc.value!r} holds "
            f"{describe_unsafe(exc.value)}, which would break the output tables"
        )
    if exc.kind == "empty":
        return IngestError(f"{src}: {where_fn(exc.positions[0])}: empty feature id")
    return exc


def read_columns(
    fd: int,
    offset: int,
    shape: tuple[int, int],
    dtype: np.dtype,
    start: int,
    stop: int,
    *,
    fortran: bool = False,
) -> np.ndarray:
    """Read columns ``start:stop`` of a matrix stored raw in a file.

    Parameters
    ----------
    fd : int
        Open file descriptor.
    offset : int
        Byte offset of element (0, 0).
    shape : (int, int)
        (n_rows, n_cols) of the stored matrix.
    dtype : numpy dtype
    start, stop : int
        Column range.
    fortran : bool
        Column-major storage (each column contiguous) instead of row-major.

    Returns
    -------
    ndarray of shape (n_rows, stop - start), a new array
    """
    n_rows, n_cols = shape
    dtype = np.dtype(dtype)
    size = dtype.itemsize
    width = stop - start
    if fortran:
        # Columns are contiguous: one read of the whole range.
        out = np.empty((width, n_rows), dtype)
        _pread_exact(fd, out, offset + start * n_rows * size)
        return out.T
    out = np.empty((n_rows, width), dtype)
    if width == n_cols:
        _pread_exact(fd, out, offset)
        return out
    row_bytes = n_cols * size
    base = offset + start * size
    for i in range(n_rows):  # one read per row (sample); the columns come in one piece
        _pread_exact(fd, out[i], base + i * row_bytes)
    return out


def _pread_exact(fd: int, out: np.ndarray, pos: int) -> None:
    view = memoryview(out).cast("B")
    done = 0
    while done < view.nbytes:
        got = os.preadv(fd, [view[done:]], pos + done)
        if got == 0:
            raise IngestError(f"file ended early at byte {pos + done} (truncated?)")
        done += got


class Source:
    """A binary reader over a plain or gzip file, and the compressed bytes consumed so far.

    A gzip file is decompressed by a background thread, one batch ahead: zlib releases the GIL,
    so decompression overlaps with parsing on a second core. At most two batches wait in memory.
    """

    def __init__(self, path: str) -> None:
        self.raw = open(path, "rb")
        self.name = path
        self.size = os.fstat(self.raw.fileno()).st_size
        self.gzip = self.raw.read(2) == b"\x1f\x8b"
        self.raw.seek(0)
        self._queue: queue.Queue | None = None
        self._stop = threading.Event()

    def _decompress(self, n: int) -> None:
        try:
            with gzip.GzipFile(fileobj=self.raw) as gz:
                while not self._stop.is_set():
                    chunk = gz.read(n)
                    self._queue.put(chunk)
                    if not chunk:
                        return
        except (OSError, EOFError, zlib.error) as exc:  # a damaged gzip stream
            self._queue.put(IngestError(f"{self.name}: cannot decompress: {exc}"))

    def read(self, n: int) -> bytes:
        """The next piece of up to about ``n`` bytes; empty at the end."""
        if not self.gzip:
            return self.raw.read(n)
        if self._queue is None:
            self._queue = queue.Queue(maxsize=2)
            self._thread = threading.Thread(target=self._decompress, args=(n,), daemon=True)
            self._thread.start()
        item = self._queue.get()
        if isinstance(item, Exception):
            raise item
        return item

    def tell(self) -> int:
        return self.raw.tell()

    def close(self) -> None:
        if self._queue is not None:
            self._stop.set()
            while self._thread.is_alive():  # unblock a pending put, then let the thread end
                try:
                    self._queue.get(timeout=0.05)
                except queue.Empty:
                    pass
        self.raw.close()


def chunk_shape(
    n: int, dtype: str, chunk_features: int | None, n_features: int | None = None
) -> tuple[int, int]:
    if chunk_features is None:
        return default_chunks(n, dtype, n_features)
    if int(chunk_features) < 1:
        raise IngestError(f"chunk_features must be a positive integer; got {chunk_features!r}")
    return (min(n, MAX_SAMPLES_PER_CHUNK), int(chunk_features))
