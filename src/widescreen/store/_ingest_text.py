"""Import delimited text tables (CSV / TSV, optionally gzip-compressed) into a dataset store.

File layout: a header row, then one row per sample. The header's first cell labels the id column (any
text) and the others are feature ids; each row starts with its sample id. With ``features_as_rows``
the table is the other way round: header cells after the first are sample ids, each row is a feature.

Missing values: an empty cell, ``NA``, ``NaN``, ``nan`` or ``.`` is missing (NaN in a float store,
-128 in a dosage store). Other cells must be numbers as Python's ``float`` reads them (so ``1e-3`` and
``-0.5`` are numbers), finite (``inf`` is refused with its location, or read as missing with
``nonfinite="missing"``) and within the range of the store's dtype (``1e300`` does not fit float32); a
NUL byte in a cell is an error. A dosage cell must equal 0, 1 or 2 (``2`` and ``2.0`` both do).
Blank lines are skipped. Cells are not unquoted, except that a pair of double quotes around an id is
removed; a cell may not contain the delimiter. Windows line ends are accepted.

How memory stays bounded
------------------------
The file is read in batches of bytes (``_ingest_fields.BATCH_BYTES``), cut at a line end or, inside a
very long line, at a delimiter. Each batch is split into fields with numpy byte operations and all its
numeric cells are converted together (see `_ingest_fields`), so no Python code runs per cell and no
line is ever held whole: a single row of ten million features costs no more than a batch.

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

import os
import tempfile
from pathlib import Path

import numpy as np

from ._format import Dataset, DatasetWriter, FeatureIdError, check_new_store
from ._ingest_base import (
    IngestError,
    LineLog,
    Progress,
    Source,
    check_unique,
    chunk_shape,
    id_error,
    read_columns,
)
from ._ingest_fields import (
    BadText,
    Fields,
    decode_cells,
    iter_fields,
    parse_dosages,
    parse_numbers,
)
from ._location import is_url

__all__ = ["DELIMITERS", "MISSING_TOKENS", "IngestError", "import_table"]

#: Known extensions (before an optional ``.gz``) and their delimiters.
DELIMITERS = {".csv": ",", ".tsv": "\t", ".txt": "\t"}
#: Cells read as missing.
MISSING_TOKENS = ("", "NA", "NaN", "nan", ".")
#: Bytes of values held at once when writing chunks from the temporary file.
MEMORY_BUDGET = 128 * 2**20


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

    def __init__(
        self,
        name: str,
        dosage: bool,
        features_as_rows: bool,
        dtype: str = "float64",
        nonfinite: str = "error",
    ) -> None:
        self.name = name
        self.dosage = dosage
        self.largest = float(np.finfo(dtype).max) if not dosage else np.inf
        self.dtype = dtype
        self.nonfinite = nonfinite
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
            try:
                self.header_parts.append(decode_cells(h.buf, h.start[cells], h.stop[cells]))
            except BadText as exc:
                col = int(h.col[cells][exc.cell]) + 1
                raise IngestError(f"{self.name}: line 1, column {col}: {exc}") from None
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
        try:
            ids = decode_cells(f.buf, f.start[is_id], f.stop[is_id])
        except BadText as exc:
            line = int(f.line[is_id][exc.cell]) + 1
            raise IngestError(f"{self.name}: line {line}, column 1: {exc}") from None
        id_lines = f.line[is_id]
        empty = np.flatnonzero(np.char.str_len(ids) == 0)
        if empty.size:
            raise IngestError(
                f"{self.name}: line {id_lines[empty[0]] + 1}, column 1: empty {self.row_what} id"
            )
        cells = np.flatnonzero(f.col >= 1)
        parse = parse_dosages if self.dosage else parse_numbers
        values, bad = parse(f.buf, f.start[cells], f.stop[cells])
        problem = ""
        if bad >= 0:
            what = "a dosage (0, 1, 2 or missing)" if self.dosage else "a number"
            problem = f"{f.text(int(cells[bad]))!r} is not {what}"
        elif not self.dosage:
            bad, problem = self._out_of_range(values, f, cells)
        if bad >= 0:
            i = int(cells[bad])
            j = np.flatnonzero(id_lines == f.line[i])
            row_id = str(ids[j[0]]) if j.size else self.last_id
            raise IngestError(f"{self.where(int(f.line[i]), int(f.col[i]), row_id)}: {problem}")
        if ids.size:
            self.last_id = str(ids[-1])
        self.n_rows += ids.size
        on_rows(values, ids, id_lines)

    def _out_of_range(self, values: np.ndarray, f: Fields, cells: np.ndarray) -> tuple[int, str]:
        """The first value that is infinite or too large for the store's dtype, and why.

        With ``nonfinite="missing"`` infinite values become missing (NaN) instead.
        """
        big = np.abs(values) > self.largest  # also true for inf; NaN (missing) compares false
        if not big.any():
            return -1, ""
        inf = np.isinf(values)
        if self.nonfinite == "missing" and inf.any():
            values[inf] = np.nan
            big &= ~inf
            if not big.any():
                return -1, ""
        k = int(np.flatnonzero(big)[0])
        text = f.text(int(cells[k]))
        if inf[k]:
            return k, (
                f"{text!r} is not a finite number (pass --inf-as-missing to read infinite values "
                "as missing)"
            )
        return k, (
            f"{text!r} does not fit in {self.dtype} (largest {self.largest:.4g}); import with "
            "--dtype float64"
        )


class _SampleRows:
    """Samples as rows: spill parsed rows to a temporary file, then write feature chunks from it."""

    def __init__(self, store, name, value_kind, dtype, chunk_features, overwrite, progress, size):
        self.args = (store, name, value_kind, dtype, chunk_features, overwrite)
        self.dtype = np.dtype(dtype)
        self.progress, self.size = progress, size
        # Beside a local store (same disk); in the temporary folder for one on object storage.
        here = None if is_url(store) else Path(store).absolute().parent
        self.spill = tempfile.TemporaryFile(dir=here, prefix=".ingest-")
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
                # Drop this group before reading the next, so only one is ever held (the writer
                # keeps a view only of a final partial chunk, which has no successor).
                del vals
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
        # The line of every feature goes to disk (for messages), not the ids: memory flat in p.
        self.lines = LineLog(store)

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
        self.lines.add(lines)
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
        try:
            return self.writer.finalize()
        except FeatureIdError as exc:
            raise id_error(exc, lambda i: f"line {self.lines.at(i) + 1}", name) from None

    def close(self) -> None:
        self.lines.close()

    def abort(self) -> None:
        if self.writer is not None:
            self.writer.abort()


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
    nonfinite: str = "error",
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
    nonfinite : {"error", "missing"}
        What an infinite value (``inf``, ``-Infinity``) is: an error naming its line and column
        (default), or missing. Values too large for ``dtype`` are always an error.

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
    check_new_store(store, overwrite, IngestError)
    source = Source(name)
    sink_cls = _FeatureRows if features_as_rows else _SampleRows
    sink = sink_cls(
        store, name, value_kind, dtype, chunk_features, overwrite, progress, source.size
    )
    if nonfinite not in ("error", "missing"):
        raise IngestError(f"nonfinite must be 'error' or 'missing'; got {nonfinite!r}")
    table = _Table(name, value_kind == "dosage", features_as_rows, dtype, nonfinite)
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
