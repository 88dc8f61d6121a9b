"""Import a ``.npy`` matrix of shape (n_samples, n_features) into a dataset store.

The array is never loaded whole. `np.load(mmap_mode="r")` reads the header (shape, dtype, memory order
and where the data start); the values are then read one group of feature columns at a time with
positioned reads (``os.preadv``) into a fresh buffer. Reading through the memory map itself would also
work, but every page a mapping touches stays counted in the process' resident memory until the map
is dropped, so a column-wise sweep over a C-ordered file would show the whole file as resident.

Conversions (``value_kind`` inferred from the dtype unless given):

* int8 -> dosage: values must be 0, 1, 2 or the missing sentinel -128.
* float16/32/64 -> continuous, float64 kept as float64 and the rest stored as float32; NaN is missing;
  an infinite value, or one too large for the store's dtype, is an error naming its row and column.
* other integer or bool arrays need an explicit ``value_kind``; as dosage they must hold 0, 1, 2 (or
  -128), as continuous they become float32.
* a float array imported as dosage must hold 0, 1, 2 or NaN (-> -128); an int8 array imported as
  continuous maps -128 to NaN (the int8 sentinel of the store format).
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from ._format import MISSING_INT8, Dataset, DatasetWriter, FeatureIdError
from ._ingest_base import (
    IngestError,
    Progress,
    check_unique,
    chunk_shape,
    id_error,
    read_columns,
)

#: Bytes of X read per group of feature columns.
MEMORY_BUDGET = 128 * 2**20


def read_ids(ids, expected: int, what: str, default_prefix: str) -> np.ndarray:
    """Ids from a sequence, from a text file with one id per line, or ``prefix1..prefixN`` when None."""
    if ids is None:
        return np.char.add(default_prefix, np.arange(1, expected + 1).astype(str))
    where = "the given list"
    if isinstance(ids, (str, os.PathLike)):
        where = str(ids)
        with open(ids, "rb") as fh:
            data = fh.read()
        try:
            text = data.decode("utf-8")
        except UnicodeDecodeError as exc:
            line = data[: exc.start].count(b"\n") + 1
            col = exc.start - (data.rfind(b"\n", 0, exc.start) + 1) + 1
            raise IngestError(
                f"{where}: line {line}, column {col}: not UTF-8 text (byte 0x{data[exc.start]:02x})"
            ) from None
        lines = text.split("\n")
        if lines and lines[-1] == "":
            lines.pop()  # a trailing newline ends the last line, it does not start another
        ids = [x.rstrip("\r") for x in lines]
    arr = np.asarray(list(ids), dtype=str)
    if arr.ndim != 1 or arr.size != expected:
        raise IngestError(f"{where}: {arr.size} {what} ids for {expected} {what}s")
    empty = np.flatnonzero(np.char.str_len(arr) == 0)
    if empty.size:
        raise IngestError(f"{where}: empty {what} id on line {empty[0] + 1}")
    check_unique(arr, lambda i: f"line {i + 1}", where, what)
    return arr


class _FeatureIds:
    """Feature ids handed out block by block, in order, without holding them all.

    ``None`` makes ``f1..fp`` per block; a text file (one id per line) is counted first, then read a
    block of lines at a time; a sequence given in memory is checked whole by `read_ids`. Duplicates
    and unsafe ids are found by the store writer (`id_error` turns them into this file's lines).
    """

    def __init__(self, ids, expected: int) -> None:
        self.expected = expected
        self.where = "the given list"
        self.file = None
        self.arr = None
        if isinstance(ids, (str, os.PathLike)):
            self.where = str(ids)
            n = _count_lines(self.where)
            if n != expected:
                raise IngestError(f"{self.where}: {n} feature ids for {expected} features")
            self.file = open(ids, "rb")
        elif ids is not None:
            self.arr = read_ids(ids, expected, "feature", "f")

    def take(self, start: int, stop: int) -> np.ndarray:
        if self.arr is not None:
            return self.arr[start:stop]
        if self.file is None:
            return np.char.add("f", np.arange(start + 1, stop + 1).astype(str))
        out = []
        for j in range(start, stop):
            raw = self.file.readline().rstrip(b"\n").rstrip(b"\r")
            try:
                text = raw.decode("utf-8")
            except UnicodeDecodeError as exc:
                raise IngestError(
                    f"{self.where}: line {j + 1}, column {exc.start + 1}: not UTF-8 text "
                    f"(byte 0x{raw[exc.start]:02x})"
                ) from None
            if not text:
                raise IngestError(f"{self.where}: empty feature id on line {j + 1}")
            out.append(text)
        return np.asarray(out, dtype=str)

    def close(self) -> None:
        if self.file is not None:
            self.file.close()


def _count_lines(path: str) -> int:
    """Lines of a text file (a last line without a newline counts), read 1 MiB at a time."""
    n, last = 0, b"\n"
    with open(path, "rb") as fh:
        while piece := fh.read(2**20):
            n += piece.count(b"\n")
            last = piece[-1:]
    return n + (last != b"\n")


def _plan(
    src_dtype: np.dtype, value_kind: str | None, dtype: str | None, src: str = "the .npy"
) -> tuple[str, str]:
    kind = src_dtype.kind
    if kind not in "biuf":
        raise IngestError(f"{src}: cannot import dtype {src_dtype}: need integers or floats")
    if value_kind is None:
        if src_dtype == np.int8:
            value_kind = "dosage"
        elif kind == "f":
            value_kind = "continuous"
        else:
            raise IngestError(
                f"{src}: dtype {src_dtype} needs value_kind='dosage' or 'continuous' "
                "(--dosage on the command line)"
            )
    if value_kind == "dosage":
        out = dtype or "int8"
    elif value_kind == "continuous":
        out = dtype or ("float64" if src_dtype == np.float64 else "float32")
    else:
        raise IngestError(f"value_kind must be 'dosage' or 'continuous'; got {value_kind!r}")
    return value_kind, out


def _convert(block: np.ndarray, value_kind: str, out_dtype: str, src: str, j0: int, sid, fid):
    """Block of source values -> store values, or an IngestError naming the first bad cell."""
    if value_kind == "continuous":
        if block.dtype.kind == "f":
            # Infinite values, and finite ones the store's dtype cannot hold, are refused here:
            # a kernel would drop such a feature from every pass without a word.
            big = np.abs(block) > np.finfo(out_dtype).max
            if big.any():
                i, j = np.argwhere(big)[0]
                v = block[i, j]
                why = (
                    "is not finite"
                    if np.isinf(v)
                    else f"does not fit in {out_dtype} (largest {np.finfo(out_dtype).max:.4g})"
                )
                raise IngestError(
                    f"{src}: row {i + 1} (sample {str(sid[i])!r}), column {j0 + j + 1} "
                    f"(feature {str(fid[j])!r}): value {v} {why}"
                )
        out = block.astype(out_dtype)
        if block.dtype == np.int8:
            out[block == MISSING_INT8] = np.nan
        return out
    if block.dtype.kind == "f":
        miss = np.isnan(block)
        ok = miss | (block == 0) | (block == 1) | (block == 2)
    else:
        miss = block == MISSING_INT8
        ok = miss | ((block >= 0) & (block <= 2))
    if not ok.all():
        i, j = np.argwhere(~ok)[0]
        raise IngestError(
            f"{src}: row {i + 1} (sample {str(sid[i])!r}), column {j0 + j + 1} "
            f"(feature {str(fid[j])!r}): value {block[i, j]} is not a dosage "
            f"(0, 1, 2, or {'NaN' if block.dtype.kind == 'f' else MISSING_INT8} for missing)"
        )
    out = np.where(miss, MISSING_INT8, block).astype(np.int8)
    return out


def import_npy(
    src: str | os.PathLike,
    store: str | os.PathLike,
    *,
    sample_ids: Sequence[str] | str | os.PathLike | None = None,
    feature_ids: Sequence[str] | str | os.PathLike | None = None,
    value_kind: str | None = None,
    dtype: str | None = None,
    chunk_features: int | None = None,
    overwrite: bool = False,
    progress: Progress = None,
) -> Dataset:
    """Import a 2-d ``.npy`` array of shape (n_samples, n_features) with bounded memory.

    Parameters
    ----------
    src : path
        The ``.npy`` file (C or Fortran order).
    store : path
        Folder of the new dataset store.
    sample_ids, feature_ids : sequence of str, or path of a text file with one id per line, optional
        Default ``s1..sn`` and ``f1..fp``.
    value_kind : {"dosage", "continuous"}, optional
        Inferred from the dtype when None (int8 -> dosage, float -> continuous).
    dtype : str, optional
        Store dtype; int8 for dosage, float32 (float64 for float64 input) for continuous by default.
    chunk_features : int, optional
        Features per chunk of X; `default_chunks` by default.
    overwrite : bool
        Replace an existing store at ``store``.
    progress : callable(done, total), optional
        Called after each block with features written and the total.

    Returns
    -------
    Dataset
        The complete store, opened for reading.
    """
    src = str(src)
    if not Path(src).is_file():
        raise IngestError(f"{src}: no such file")
    try:
        mm = np.load(src, mmap_mode="r", allow_pickle=False)
    except Exception as exc:
        raise IngestError(f"{src}: not a readable .npy file: {exc}") from exc
    if not isinstance(mm, np.memmap) or mm.ndim != 2:
        raise IngestError(f"{src}: need a 2-d array (samples, features); got shape {mm.shape}")
    n, p = (int(s) for s in mm.shape)
    if n == 0 or p == 0:
        raise IngestError(f"{src}: empty array of shape {mm.shape}")
    src_dtype, offset = mm.dtype, int(mm.offset)
    fortran = bool(mm.flags.f_contiguous and not mm.flags.c_contiguous)
    del mm  # drop the map: values are read with positioned reads below
    value_kind, out_dtype = _plan(src_dtype, value_kind, dtype, src)
    sid = read_ids(sample_ids, n, "sample", "s")
    fid = _FeatureIds(feature_ids, p)
    try:
        return _write(
            src,
            store,
            sid,
            fid,
            (n, p),
            (src_dtype, offset, fortran),
            value_kind,
            out_dtype,
            chunk_features,
            overwrite,
            progress,
        )
    except FeatureIdError as exc:
        raise id_error(exc, lambda i: f"line {i + 1}", fid.where) from None
    finally:
        fid.close()


def _write(
    src, store, sid, fid, shape, layout, value_kind, out_dtype, chunk_features, overwrite, progress
) -> Dataset:
    """Write the store one group of columns at a time (see `import_npy`)."""
    (n, p), (src_dtype, offset, fortran) = shape, layout

    chunks = chunk_shape(n, out_dtype, chunk_features, p)
    width = chunks[1]
    # Read several chunks' worth of columns per group when they fit: fewer, longer reads.
    group = max(width, (MEMORY_BUDGET // max(n * src_dtype.itemsize, 1)) // width * width)
    with (
        DatasetWriter(
            store,
            sid,
            value_kind,
            out_dtype,
            n_features=p,
            chunks=chunks,
            source=src,
            overwrite=overwrite,
        ) as writer,
        open(src, "rb") as fh,
    ):
        fd = fh.fileno()
        for g0 in range(0, p, group):
            g1 = min(g0 + group, p)
            raw = read_columns(fd, offset, (n, p), src_dtype, g0, g1, fortran=fortran)
            for j0 in range(g0, g1, width):
                j1 = min(j0 + width, g1)
                ids = fid.take(j0, j1)
                block = _convert(
                    raw[:, j0 - g0 : j1 - g0], value_kind, out_dtype, src, j0, sid, ids
                )
                writer.append(block, ids)
                if progress is not None:
                    progress(j1, p)
            del raw  # one group at a time: drop it before reading the next
        return writer.finalize()
