"""Import delimited text tables (CSV / TSV, optionally gzip-compressed) into a dataset store.

File layout: a header row, then one row per sample. The header's first cell labels the id column (any
text) and the others are feature ids; each row starts with its sample id. With ``features_as_rows``
the table is the other way round: header cells after the first are sample ids, each row is a feature.

Missing values: an empty cell, ``NA``, ``NaN``, ``nan`` or ``.`` is missing (NaN in a float store,
-128 in a dosage store). Other cells must be numbers as Python's ``float`` reads them (so ``1e-3``,
``inf`` and ``-0.5`` are numbers); a dosage cell must equal 0, 1 or 2 (``2`` and ``2.0`` both do).
Blank lines are skipped. Cells are not unquoted, except that a pair of double quotes around an id is
removed; a cell may not contain the delimiter. Windows line ends are accepted.

How memory stays bounded
------------------------
The file is read in batches of bytes (`BATCH_BYTES`), cut at a line end or, inside a very long line, at
a delimiter. Each batch is split into fields with numpy byte operations (positions of delimiters and
newlines, then each field's line and column), and all its numeric cells are converted in one call
(fixed-width byte strings cast to float), so no Python code runs per cell and no line is ever held
whole: a single row of ten million features costs no more than a batch.

* ``features_as_rows=True``: rows are features, which is the store's streaming direction. Complete rows
  are buffered up to one chunk of features and handed to the writer.
* Samples as rows (the default): X is chunked over features with all samples per chunk, so no chunk is
  complete before the last row is read. The first pass parses every cell exactly once and appends the
  values, row after row in the store's dtype, to an anonymous temporary file beside the store (it
  vanishes when closed, even after a crash). The second pass reads it back a group of feature
  columns at a time (one positioned read per sample and group, at most `MEMORY_BUDGET` bytes) and
  writes the chunks. The temporary file is n_samples x n_features x itemsize bytes, about 40 % of a
  CSV of 9-digit numbers in float32.

Errors are `IngestError` (a `StoreError`) naming the file, the 1-based line (the header is line 1),
the 1-based column and the ids of both. The store is written through `DatasetWriter` and removed on
any error, so a failed import never leaves a store that `open_dataset` accepts.
"""

from __future__ import annotations

import gzip
import os
import queue
import tempfile
import threading
import zlib
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ._format import (
    MAX_SAMPLES_PER_CHUNK,
    MISSING_INT8,
    Dataset,
    DatasetWriter,
    StoreError,
    default_chunks,
)

#: Known extensions (before an optional ``.gz``) and their delimiters.
DELIMITERS = {".csv": ",", ".tsv": "\t", ".txt": "\t"}
#: Cells read as missing.
MISSING_TOKENS = ("", "NA", "NaN", "nan", ".")
#: Bytes of text parsed per batch.
BATCH_BYTES = 8 * 2**20
#: Bytes of values held at once when writing chunks from the temporary file.
MEMORY_BUDGET = 128 * 2**20
#: Numeric cells longer than this are parsed one by one (keeps the byte matrices small).
LONG_CELL = 32
_SLICE = 2**18  # cells converted per numpy call
_PLAIN_WIDTH = 17  # sign, 15 digits and a point
_POW10 = 10.0 ** np.arange(16)
_NL, _CR, _QUOTE = 10, 13, 34

Progress = Callable[[int, int], None] | None


class IngestError(StoreError):
    """An input file cannot be imported: what is wrong and where (file, line, column)."""


def check_unique(ids: np.ndarray, where_fn: Callable[[int], str], src: str, what: str) -> None:
    """Raise `IngestError` naming the first duplicated id and both of its positions."""
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


@dataclass(frozen=True)
class Fields:
    """The fields of one batch of text.

    Attributes
    ----------
    buf : ndarray of shape (n_bytes,), uint8
    start, stop : ndarray of shape (k,), int64
        Byte range of each field in ``buf`` (a carriage return before a newline excluded).
    line, col : ndarray of shape (k,), int64
        0-based line of the file and 0-based field index within the line.
    eol : ndarray of shape (k,), bool
        The field is the last of its line.
    """

    buf: np.ndarray
    start: np.ndarray
    stop: np.ndarray
    line: np.ndarray
    col: np.ndarray
    eol: np.ndarray

    def text(self, i: int, limit: int = 40) -> str:
        s = self.buf[self.start[i] : self.stop[i]].tobytes().decode("utf-8", "replace")
        return s if len(s) <= limit else s[:limit] + "..."


def iter_fields(src: Source, delim: int, batch_bytes: int | None = None) -> Iterator[Fields]:
    """Split a delimited file into batches of fields, each cut at a line end or at a delimiter."""
    batch_bytes = batch_bytes or BATCH_BYTES
    line, col = 0, 0
    carry = b""
    first = True
    while True:
        chunk = src.read(batch_bytes)
        if first:
            chunk = chunk.removeprefix(b"\xef\xbb\xbf")  # UTF-8 byte-order mark
            first = False
        buf = carry + chunk if carry else chunk
        if not chunk:
            if not buf:
                return
            if not buf.endswith(b"\n"):
                buf += b"\n"
            cut = len(buf)
        else:
            cut = buf.rfind(b"\n") + 1
            if cut == 0:  # inside a line longer than the batch: cut at a delimiter
                cut = buf.rfind(bytes([delim])) + 1
                if cut == 0:  # inside a single huge field: read on
                    carry = buf
                    continue
        carry = buf[cut:]
        fields = _split(np.frombuffer(buf, np.uint8, count=cut), delim, line, col)
        n_eol = int(fields.eol.sum())
        line += n_eol
        col = 0 if fields.eol[-1] else int(fields.col[-1]) + 1
        yield fields


def _split(a: np.ndarray, delim: int, line0: int, col0: int) -> Fields:
    sep = np.flatnonzero((a == delim) | (a == _NL))  # a ends with a separator
    k = sep.size
    start = np.empty(k, np.int64)
    start[0] = 0
    start[1:] = sep[:-1] + 1
    stop = sep.astype(np.int64)
    eol = a[sep] == _NL
    cr = np.flatnonzero(eol & (stop > start))
    cr = cr[a[stop[cr] - 1] == _CR]
    stop[cr] -= 1
    ends_before = np.cumsum(eol) - eol  # lines finished before each field
    first_field = np.flatnonzero(np.r_[True, eol[:-1]])
    col = np.arange(k, dtype=np.int64) - first_field[ends_before]
    col[ends_before == 0] += col0
    return Fields(a, start, stop, line0 + ends_before, col, eol)


def byte_strings(buf: np.ndarray, start: np.ndarray, length: np.ndarray, width: int) -> np.ndarray:
    """Cells as a fixed-width byte-string array of shape (k,), dtype ``S{width}``, NUL padded."""
    idx = start[:, None] + np.arange(width)
    np.minimum(idx, buf.size - 1, out=idx)
    m = buf[idx]
    m[np.arange(width) >= length[:, None]] = 0
    return m.view(f"S{width}").ravel()


def decode_cells(buf: np.ndarray, start: np.ndarray, stop: np.ndarray) -> np.ndarray:
    """Id cells as a unicode array, one surrounding pair of double quotes removed."""
    start, stop = start.copy(), stop.copy()
    q = np.flatnonzero(stop - start >= 2)
    q = q[(buf[start[q]] == _QUOTE) & (buf[stop[q] - 1] == _QUOTE)]
    start[q] += 1
    stop[q] -= 1
    length = stop - start
    if length.size == 0:
        return np.empty(0, "U1")
    out = []
    for s0 in range(0, length.size, _SLICE // 4):
        sl = slice(s0, s0 + _SLICE // 4)
        w = max(int(length[sl].max()), 1)
        s = byte_strings(buf, start[sl], length[sl], w)
        ascii_only = not np.any(s.view(np.uint8) >= 128)
        out.append(s.astype(f"U{w}") if ascii_only else np.strings.decode(s, "utf-8"))
    return np.concatenate(out) if len(out) > 1 else out[0]


def parse_numbers(buf: np.ndarray, start: np.ndarray, stop: np.ndarray) -> tuple[np.ndarray, int]:
    """Numeric cells as float64 (missing tokens -> NaN) and the index of the first bad cell, or -1.

    Plain decimals (``-12.5``, at most 15 digits) are converted by `_plain_decimals`; every other
    cell (exponents, ``inf``, missing tokens, bad text) goes through numpy's string cast.
    """
    out = np.empty(start.size, np.float64)
    for s0 in range(0, start.size, _SLICE):
        sl = slice(s0, s0 + _SLICE)
        out[sl], other = _plain_decimals(buf, start[sl], stop[sl] - start[sl])
        idx = s0 + np.flatnonzero(other)
        if idx.size:
            out[idx], bad = _parse_general(buf, start[idx], stop[idx])
            if bad >= 0:
                return out, int(idx[bad])
    return out, -1


def _plain_decimals(
    buf: np.ndarray, start: np.ndarray, length: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Convert cells of the form ``[+-]digits[.digits]`` (1 to 15 digits) without Python code.

    The digits are accumulated column by column into an exact int64 mantissa m; the value is
    m / 10**f for f digits after the point. Both are exact doubles (m < 2**53, f <= 15), so the one
    division rounds correctly: the result is the same double a decimal-to-binary conversion gives.

    Returns the values and a mask of the cells not of that form (left for `_parse_general`).
    """
    k = start.size
    width = int(min(length.max(initial=0), _PLAIN_WIDTH))
    mant = np.zeros(k, np.float64)  # integers below 2**53 are exact in a double
    step = np.empty(k, np.float64)
    n_digits = np.zeros(k, np.int8)
    n_frac = np.zeros(k, np.int8)
    seen_dot = np.zeros(k, bool)
    other = (length == 0) | (length > _PLAIN_WIDTH)
    first = buf[start]
    neg = first == ord("-")
    signed = neg | (first == ord("+"))
    pos = start.copy()
    for j in range(width):  # one pass per character position, over all cells at once
        live = length > j
        c = buf.take(pos, mode="clip") if j else first
        digit = (c - np.uint8(ord("0"))) <= 9  # uint8 wraps below '0'
        digit &= live
        dot = c == ord(".")
        dot &= live
        np.multiply(mant, 10.0, out=step)
        step += c
        step -= ord("0")
        np.copyto(mant, step, where=digit)
        n_digits += digit
        n_frac += digit & seen_dot
        other |= dot & seen_dot  # a second point
        seen_dot |= dot
        stray = live & ~(digit | dot)
        if j == 0:
            stray &= ~signed
        other |= stray
        pos += 1
    other |= (n_digits == 0) | (n_digits > 15)
    vals = mant / _POW10[np.minimum(n_frac, 15)]
    np.negative(vals, out=vals, where=neg)
    return vals, other


def _parse_general(buf: np.ndarray, start: np.ndarray, stop: np.ndarray) -> tuple[np.ndarray, int]:
    """Any cell through numpy's string-to-float cast (Python's float syntax); missing -> NaN."""
    k = start.size
    out = np.empty(k, np.float64)
    length = stop - start
    long_cells = np.flatnonzero(length > LONG_CELL)
    bad = -1
    for s0 in range(0, k, _SLICE):
        sl = slice(s0, s0 + _SLICE)
        ln = np.where(length[sl] > LONG_CELL, 0, length[sl])
        w = max(int(ln.max(initial=0)), 3)
        s = byte_strings(buf, start[sl], ln, w)
        s[(ln == 0) | (s == b"NA") | (s == b".")] = b"nan"
        try:
            out[sl] = s.astype(np.float64)
        except ValueError:
            bad = s0 + _first_bad(s)
            break
    for i in long_cells:
        if 0 <= bad < i:
            break
        try:
            out[i] = float(buf[start[i] : stop[i]].tobytes())
        except ValueError:
            bad = int(i) if bad < 0 else min(bad, int(i))
            break
    return out, bad


def _first_bad(s: np.ndarray) -> int:
    """Index of the first element of ``s`` that does not cast to float (bisection over casts)."""
    lo, hi = 0, s.size
    while hi - lo > 1:
        mid = (lo + hi) // 2
        try:
            s[lo:mid].astype(np.float64)
            lo = mid
        except ValueError:
            hi = mid
    return lo


def parse_dosages(buf: np.ndarray, start: np.ndarray, stop: np.ndarray) -> tuple[np.ndarray, int]:
    """Dosage cells 0/1/2 as int8 (missing tokens -> -128) and the first bad cell's index, or -1."""
    if start.size and np.all(stop - start == 1):  # fast path: single characters
        c = buf[start]
        d = c.astype(np.int16) - ord("0")
        ok = (d >= 0) & (d <= 2)
        miss = c == ord(".")
        if np.all(ok | miss):
            return np.where(miss, MISSING_INT8, d).astype(np.int8), -1
    vals, bad = parse_numbers(buf, start, stop)
    upto = vals.size if bad < 0 else bad
    v = vals[:upto]
    wrong = np.flatnonzero(~(np.isnan(v) | (v == 0) | (v == 1) | (v == 2)))
    if wrong.size:
        bad = int(wrong[0])
    if bad >= 0:
        return np.empty(0, np.int8), bad
    return np.where(np.isnan(vals), MISSING_INT8, vals).astype(np.int8), -1


def _delimiter_for(src: str, delimiter: str | None) -> int:
    if delimiter is not None:
        if len(delimiter) != 1 or delimiter in '\n\r"':
            raise IngestError(
                f"delimiter must be one character other than a newline or quote; got {delimiter!r}"
            )
        return ord(delimiter)
    name = src.lower().removesuffix(".gz")
    ext = Path(name).suffix
    if ext not in DELIMITERS:
        known = ", ".join(f"{e} and {e}.gz" for e in DELIMITERS)
        raise IngestError(
            f"{src}: unknown extension {ext or '(none)'!r}; known are {known} (or give a delimiter)"
        )
    return ord(DELIMITERS[ext])


def _take(f: Fields, sel) -> Fields:
    return Fields(f.buf, f.start[sel], f.stop[sel], f.line[sel], f.col[sel], f.eol[sel])


class _Table:
    """Validate the header and rows of a table and hand rows of values to a sink, batch by batch."""

    def __init__(self, name: str, dosage: bool, features_as_rows: bool) -> None:
        self.name = name
        self.dosage = dosage
        self.row_what, self.col_what = (
            ("feature", "sample") if features_as_rows else ("sample", "feature")
        )
        self.header_parts: list[np.ndarray] = []
        self.header: np.ndarray | None = None
        self.last_id = ""
        self.n_rows = 0

    def where(self, line: int, col: int, row_id: str) -> str:
        return (
            f"{self.name}: line {line + 1} ({self.row_what} {row_id!r}), column {col + 1} "
            f"({self.col_what} {str(self.header[col - 1])!r})"
        )

    def feed(self, f: Fields, on_header, on_rows) -> None:
        if self.header is None:
            nh = int(np.searchsorted(f.line, 1))  # fields of line 1 (index 0) come first
            h = _take(f, slice(0, nh))
            cells = h.col >= 1
            self.header_parts.append(decode_cells(h.buf, h.start[cells], h.stop[cells]))
            if nh and h.eol[-1]:
                self._finish_header(on_header)
            f = _take(f, slice(nh, None))
            if f.start.size == 0:
                return
        self._rows(f, on_rows)

    def _finish_header(self, on_header) -> None:
        header = np.concatenate(self.header_parts)
        self.header_parts = []
        if header.size == 0:
            raise IngestError(
                f"{self.name}: line 1 has a single field; expected a label for the id column "
                f"followed by {self.col_what} ids (is the delimiter right?)"
            )
        empty = np.flatnonzero(np.char.str_len(header) == 0)
        if empty.size:
            raise IngestError(
                f"{self.name}: line 1, column {empty[0] + 2}: empty {self.col_what} id"
            )
        check_unique(header, lambda i: f"line 1, column {i + 2}", self.name, self.col_what)
        self.header = header
        on_header(header)

    def _rows(self, f: Fields, on_rows) -> None:
        n_fields = self.header.size + 1
        length = f.stop - f.start
        blank = f.eol & (f.col == 0) & (length == 0)
        short = np.flatnonzero(f.eol & ~blank & (f.col + 1 < n_fields))
        extra = np.flatnonzero(f.col >= n_fields)
        if short.size or extra.size:
            i = min(short[0] if short.size else np.inf, extra[0] if extra.size else np.inf)
            i = int(i)
            line = int(f.line[i]) + 1
            if f.col[i] >= n_fields:
                msg = f"line {line} has more than {n_fields} fields (the header has {n_fields})"
            else:
                c = int(f.col[i]) + 1
                msg = (
                    f"line {line} has {c} fields but the header has {n_fields}: column {c + 1} "
                    f"({self.col_what} {str(self.header[c - 1])!r}) is missing"
                )
            raise IngestError(f"{self.name}: {msg}")
        is_id = (f.col == 0) & ~blank
        ids = decode_cells(f.buf, f.start[is_id], f.stop[is_id])
        id_lines = f.line[is_id]
        empty = np.flatnonzero(np.char.str_len(ids) == 0)
        if empty.size:
            raise IngestError(
                f"{self.name}: line {id_lines[empty[0]] + 1}, column 1: empty {self.row_what} id"
            )
        cells = np.flatnonzero(f.col >= 1)
        parse = parse_dosages if self.dosage else parse_numbers
        values, bad = parse(f.buf, f.start[cells], f.stop[cells])
        if bad >= 0:
            i = int(cells[bad])
            j = np.flatnonzero(id_lines == f.line[i])
            row_id = str(ids[j[0]]) if j.size else self.last_id
            what = "a dosage (0, 1, 2 or missing)" if self.dosage else "a number"
            raise IngestError(
                f"{self.where(int(f.line[i]), int(f.col[i]), row_id)}: {f.text(i)!r} is not {what}"
            )
        if ids.size:
            self.last_id = str(ids[-1])
        self.n_rows += ids.size
        on_rows(values, ids, id_lines)


class _SampleRows:
    """Samples as rows: spill parsed rows to a temporary file, then write feature chunks from it."""

    def __init__(self, store, name, value_kind, dtype, chunk_features, overwrite, progress, size):
        self.args = (store, name, value_kind, dtype, chunk_features, overwrite)
        self.dtype = np.dtype(dtype)
        self.progress, self.size = progress, size
        self.spill = tempfile.TemporaryFile(dir=Path(store).absolute().parent, prefix=".ingest-")
        self.ids: list[np.ndarray] = []
        self.lines: list[np.ndarray] = []
        self.n_values = 0

    def on_header(self, header: np.ndarray) -> None:
        self.feature_ids = header

    def on_rows(self, values: np.ndarray, ids: np.ndarray, lines: np.ndarray) -> None:
        self.spill.write(memoryview(values.astype(self.dtype, copy=False)))
        self.n_values += values.size
        self.ids.append(ids)
        self.lines.append(lines)

    def parse_progress(self, done: int) -> None:
        if self.progress is not None:
            self.progress(done, 2 * self.size)

    def finish(self) -> Dataset:
        store, name, value_kind, dtype, chunk_features, overwrite = self.args
        sid = np.concatenate(self.ids)
        lines = np.concatenate(self.lines)
        check_unique(sid, lambda i: f"line {lines[i] + 1}", name, "sample")
        n, p = sid.size, self.feature_ids.size
        if self.n_values != n * p:  # guarded by the row checks; a mismatch is a bug
            raise IngestError(f"{name}: parsed {self.n_values} values for {n} x {p}")
        self.spill.flush()
        chunks = chunk_shape(n, dtype, chunk_features, p)
        width = chunks[1]
        group = max(width, (MEMORY_BUDGET // (n * self.dtype.itemsize)) // width * width)
        fd = self.spill.fileno()
        with DatasetWriter(
            store,
            sid,
            value_kind,
            dtype,
            n_features=p,
            chunks=chunks,
            source=name,
            overwrite=overwrite,
        ) as writer:
            for g0 in range(0, p, group):
                g1 = min(g0 + group, p)
                vals = read_columns(fd, 0, (n, p), self.dtype, g0, g1)
                for j0 in range(g0, g1, width):
                    j1 = min(j0 + width, g1)
                    writer.append(vals[:, j0 - g0 : j1 - g0], self.feature_ids[j0:j1])
                if self.progress is not None:
                    self.progress(self.size + (self.size * g1) // p, 2 * self.size)
            return writer.finalize()

    def close(self) -> None:
        self.spill.close()


class _FeatureRows:
    """Features as rows: stream whole chunks of rows to the writer as they complete."""

    def __init__(self, store, name, value_kind, dtype, chunk_features, overwrite, progress, size):
        self.args = (store, name, value_kind, dtype, chunk_features, overwrite)
        self.progress, self.size = progress, size
        self.writer: DatasetWriter | None = None
        self.parts: list[np.ndarray] = []
        self.n_pending = 0
        self.pending_ids: list[np.ndarray] = []
        self.all_ids: list[np.ndarray] = []
        self.all_lines: list[np.ndarray] = []

    def on_header(self, header: np.ndarray) -> None:
        store, name, value_kind, dtype, chunk_features, overwrite = self.args
        self.n = header.size
        chunks = chunk_shape(self.n, dtype, chunk_features)
        self.width = chunks[1]
        self.writer = DatasetWriter(
            store, header, value_kind, dtype, chunks=chunks, source=name, overwrite=overwrite
        )

    def on_rows(self, values: np.ndarray, ids: np.ndarray, lines: np.ndarray) -> None:
        self.parts.append(values.astype(self.writer.dtype, copy=False))
        self.n_pending += values.size
        self.pending_ids.append(ids)
        self.all_ids.append(ids)
        self.all_lines.append(lines)
        if self.n_pending >= self.n * self.width:
            self._emit()

    def _emit(self) -> None:
        flat = np.concatenate(self.parts) if len(self.parts) > 1 else self.parts[0]
        rows = flat.size // self.n
        ids = np.concatenate(self.pending_ids)
        if rows:
            self.writer.append(flat[: rows * self.n].reshape(rows, self.n).T, ids[:rows])
        rest = flat[rows * self.n :]
        self.parts = [rest] if rest.size else []
        self.n_pending = rest.size
        self.pending_ids = [ids[rows:]]

    def parse_progress(self, done: int) -> None:
        if self.progress is not None:
            self.progress(done, self.size)

    def finish(self) -> Dataset:
        name = self.args[1]
        if self.parts:
            self._emit()
        ids = np.concatenate(self.all_ids)
        lines = np.concatenate(self.all_lines)
        check_unique(ids, lambda i: f"line {lines[i] + 1}", name, "feature")
        return self.writer.finalize()

    def close(self) -> None:
        pass

    def abort(self) -> None:
        if self.writer is not None:
            self.writer.abort()


def chunk_shape(
    n: int, dtype: str, chunk_features: int | None, n_features: int | None = None
) -> tuple[int, int]:
    if chunk_features is None:
        return default_chunks(n, dtype, n_features)
    if int(chunk_features) < 1:
        raise IngestError(f"chunk_features must be a positive integer; got {chunk_features!r}")
    return (min(n, MAX_SAMPLES_PER_CHUNK), int(chunk_features))


def import_table(
    src: str | os.PathLike,
    store: str | os.PathLike,
    *,
    features_as_rows: bool = False,
    delimiter: str | None = None,
    dtype: str | None = None,
    value_kind: str = "continuous",
    chunk_features: int | None = None,
    overwrite: bool = False,
    progress: Progress = None,
) -> Dataset:
    """Import a CSV / TSV table (plain or gzip) into a dataset store with bounded memory.

    Parameters
    ----------
    src : path
        ``.csv``, ``.tsv`` or ``.txt``, each optionally ``.gz`` (gzip is recognised by its magic bytes).
    store : path
        Folder of the new dataset store.
    features_as_rows : bool
        The file's rows are features and its header holds sample ids (default: rows are samples).
    delimiter : str, optional
        One character; by default ``,`` for ``.csv`` and a tab for ``.tsv`` / ``.txt``.
    dtype : {"float32", "float64", "int8"}, optional
        float32 for continuous values, int8 for dosages by default.
    value_kind : {"continuous", "dosage"}
        Dosage cells must be 0, 1, 2 or a missing token.
    chunk_features : int, optional
        Features per chunk of X; `default_chunks` by default.
    overwrite : bool
        Replace an existing store at ``store``.
    progress : callable(done, total), optional
        Called after every batch; ``done`` and ``total`` count input bytes (compressed bytes for a
        gzip file), the write-out of a samples-as-rows table counting as a second read.

    Returns
    -------
    Dataset
        The complete store, opened for reading.

    Raises
    ------
    IngestError
        Naming the file, line, column and ids of the first problem.
    """
    name = str(src)
    if value_kind not in ("continuous", "dosage"):
        raise IngestError(f"value_kind must be 'continuous' or 'dosage'; got {value_kind!r}")
    dtype = dtype or ("int8" if value_kind == "dosage" else "float32")
    allowed = ("int8",) if value_kind == "dosage" else ("float32", "float64")
    if dtype not in allowed:
        raise IngestError(
            f"a {value_kind} import stores {' or '.join(allowed)}; got dtype {dtype!r}"
        )
    delim = _delimiter_for(name, delimiter)
    if not Path(name).is_file():
        raise IngestError(f"{name}: no such file")
    if Path(store).exists() and not overwrite:
        raise IngestError(f"{store}: already exists (choose another path or overwrite)")
    source = Source(name)
    sink_cls = _FeatureRows if features_as_rows else _SampleRows
    sink = sink_cls(
        store, name, value_kind, dtype, chunk_features, overwrite, progress, source.size
    )
    table = _Table(name, value_kind == "dosage", features_as_rows)
    try:
        any_batch = False
        for fields in iter_fields(source, delim):
            any_batch = True
            table.feed(fields, sink.on_header, sink.on_rows)
            sink.parse_progress(source.tell())
        if not any_batch:
            raise IngestError(f"{name}: empty file")
        if table.n_rows == 0:
            raise IngestError(f"{name}: a header but no data rows")
        return sink.finish()
    except BaseException:
        if isinstance(sink, _FeatureRows):
            sink.abort()
        raise
    finally:
        sink.close()
        source.close()
