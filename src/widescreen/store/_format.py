"""The on-disk dataset format, version 1: a plain Zarr v3 group.

Layout (every node readable by any Zarr v3 reader)::

    STORE/
      zarr.json            group attributes under the key "widescreen" (see `FormatAttributes`)
      X/                   (n_samples, n_features) int8 | float32 | float64, chunked over features
      samples/id/          (n_samples,) UTF-8 strings
      features/id/         (n_features,) UTF-8 strings
      features/chrom/      (n_features,) UTF-8 strings        optional annotation
      features/pos/        (n_features,) int64                optional annotation

Missing values are NaN for floating-point stores and ``MISSING_INT8`` (-128) for int8 dosage stores.

A store is *complete* only once ``finalize`` has written ``"complete": true`` into the group attributes;
`open_dataset` refuses an incomplete store, so an interrupted import never looks valid.
"""

from __future__ import annotations

import hashlib
import json
import os
import tempfile
from dataclasses import asdict, dataclass
from functools import cached_property
from pathlib import Path

import numpy as np
import zarr
from zarr.codecs import BloscCodec, Crc32cCodec, ZstdCodec

from .._version import __version__
from . import _checksum, _ids
from ._errors import ChunkError, StoreError
from ._ids import DuplicateFinder, StreamedColumn
from ._location import RemotePath, census, open_group, place, remove_tree

#: Version written by this widescreen: 2 adds per-chunk CRC-32C checksums (see `_checksum`).
FORMAT_VERSION = 2
#: Versions this widescreen opens (1: written before checksums).
READABLE_VERSIONS = (1, 2)
#: Characters no id may hold: they would break the tab-separated tables and line-based outputs.
UNSAFE_ID_CHARS = ("\t", "\n", "\r", "\x00")
ATTRS_KEY = "widescreen"
MISSING_INT8 = -128
VALUE_KINDS = ("dosage", "continuous")
# Dosages are int8 counts (0/1/2) or, for imputed data, float32 expected counts.
DTYPES = {"dosage": ("int8", "float32"), "continuous": ("float32", "float64")}

#: Target size of one chunk of X in bytes; the design aims at 8-64 MiB chunks.
TARGET_CHUNK_BYTES = 16 * 2**20
#: Above this many samples X is chunked over samples as well.
MAX_SAMPLES_PER_CHUNK = 65_536


class FeatureIdError(StoreError):
    """A feature id (or a chromosome) a writer refused, with what and where, for importers' messages.

    Attributes
    ----------
    kind : {"empty", "unsafe", "duplicate", "chrom"}
    value : str
        The id (the chromosome for ``"chrom"``).
    positions : tuple of int
        0-based feature positions: one, or the first two occurrences of a duplicate.
    """

    def __init__(self, message: str, kind: str, value: str, positions: tuple[int, ...]) -> None:
        super().__init__(message)
        self.kind, self.value, self.positions = kind, value, positions


@dataclass(frozen=True)
class FormatAttributes:
    """Group attributes of a dataset store, as stored under ``zarr.json`` -> ``widescreen``."""

    format_version: int
    value_kind: str
    dtype: str
    n_samples: int
    n_features: int
    missing_sentinel: int | None
    creator: str
    complete: bool
    source: str = ""
    checksums: str = ""  # "crc32c" from format version 2

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict) -> FormatAttributes:
        known = {k: d[k] for k in cls.__dataclass_fields__ if k in d}
        return cls(**known)


def default_codec(dtype: str) -> BloscCodec:
    """Codec chosen per value kind.

    int8 dosages compress about 4x with bit-shuffle at lz4 speed; normal floats barely compress, so
    they get the cheapest decoder (lz4 with byte shuffle) rather than zstd, whose decode is slower.
    """
    dt = np.dtype(dtype)
    if dt == np.int8:
        return BloscCodec(cname="lz4", clevel=5, shuffle="bitshuffle", typesize=1)
    return BloscCodec(cname="lz4", clevel=3, shuffle="shuffle", typesize=dt.itemsize)


def default_chunks(
    n_samples: int,
    dtype: str,
    n_features: int | None = None,
    max_samples: int = MAX_SAMPLES_PER_CHUNK,
) -> tuple[int, int]:
    """Chunk shape for X: all samples (up to ``max_samples``) times as many features as fit the
    target size.

    When the number of features is known and small, chunks are narrowed so that a pass still has at
    least about eight blocks to spread over the cores (but never below 256 features), and a chunk is
    never wider than the features (a store of 401 features is not written as 131,072-wide chunks).
    """
    rows = min(max(n_samples, 1), int(max_samples))
    itemsize = np.dtype(dtype).itemsize
    cols = max(64, TARGET_CHUNK_BYTES // (rows * itemsize))
    if n_features is not None:
        cols = min(cols, max(256, n_features // 8))
    cols = int(2 ** np.floor(np.log2(cols)))  # powers of two keep block plans aligned
    if n_features is not None:
        cols = max(1, min(cols, n_features))
    return rows, cols


def unsafe_id(ids: np.ndarray) -> int | None:
    """Position of the first id holding a tab, newline, carriage return or NUL, or None.

    Vectorised over the ids' code points (a fixed-width unicode view), a slice of ids at a time.
    """
    ids = as_unicode(np.asarray(ids).astype(str) if np.asarray(ids).dtype.kind not in "UT" else ids)
    if ids.size == 0:
        return None
    ids = ids.reshape(-1)
    width = ids.dtype.itemsize // 4
    step = max(1, 2**22 // width)
    controls = np.array([ord(c) for c in UNSAFE_ID_CHARS if c != "\x00"], dtype=np.uint32)
    for a in range(0, ids.size, step):
        codes = ids[a : a + step].view(np.uint32).reshape(-1, width)
        bad = np.isin(codes, controls).any(axis=1)
        # A NUL inside an id (fixed-width strings pad with NULs, so only one followed by a character)
        used = codes != 0
        length = width - np.argmax(used[:, ::-1], axis=1)
        bad |= used.any(axis=1) & (used.sum(axis=1) < length)
        hit = np.flatnonzero(bad)
        if hit.size:
            return a + int(hit[0])
    return None


def describe_unsafe(value: str) -> str:
    """Which unsafe character an id holds, for messages."""
    names = {"\t": "a tab", "\n": "a newline", "\r": "a carriage return", "\x00": "a NUL byte"}
    return next((names[c] for c in UNSAFE_ID_CHARS if c in value), "a control character")


def _check_ids(ids: np.ndarray, what: str, where: str) -> None:
    if ids.size == 0:
        return
    empty = np.flatnonzero(np.strings.str_len(as_unicode(ids)) == 0)
    if empty.size:
        raise StoreError(f"{where}: empty {what} id at position {empty[0] + 1}")
    bad = unsafe_id(ids)
    if bad is not None:
        raise StoreError(
            f"{where}: {what} id {str(ids[bad])!r} at position {bad + 1} holds "
            f"{describe_unsafe(str(ids[bad]))}, which would break the output tables"
        )
    uniq, _first, counts = np.unique(ids, return_index=True, return_counts=True)
    if np.any(counts > 1):
        dup = str(uniq[counts > 1][0])
        pos = np.flatnonzero(ids == dup)[:2]
        raise StoreError(
            f"{where}: duplicate {what} id {dup!r} at positions {pos[0] + 1} and {pos[1] + 1}"
        )


class DatasetWriter:
    """Write a dataset store feature block by feature block, with bounded memory.

    The store is created incomplete; `finalize` writes what is left and marks it complete. If the
    writer is closed without `finalize` (an error, a kill), the partial store stays marked incomplete
    and `open_dataset` refuses it. Feature ids and annotations are written chunk by chunk as blocks
    arrive and checked without being held (`widescreen.store._ids`), so memory does not grow with p;
    a refused id raises `FeatureIdError` from `finalize`, after every block was appended.

    Parameters
    ----------
    path : str or Path
        Folder of the new store. Refused if it exists, unless ``overwrite``.
    sample_ids : sequence of str, of length n_samples
    value_kind : {"dosage", "continuous"}
    dtype : {"int8", "float32", "float64"}
    n_features : int, optional
        Final number of features when known in advance; otherwise X grows as blocks arrive.
    chunks : (int, int), optional
        Chunk shape of X; `default_chunks` by default.
    source : str
        Where the data came from, recorded in the attributes.
    max_samples_per_chunk : int
        Above this many samples the default chunks split X over samples too (65,536; smaller in tests).
    id_chunk : int, optional
        Entries per chunk of the id and annotation arrays (`_ids.ID_CHUNK`; smaller in tests).
    """

    def __init__(
        self,
        path: str | os.PathLike,
        sample_ids,
        value_kind: str = "continuous",
        dtype: str = "float32",
        *,
        n_features: int | None = None,
        chunks: tuple[int, int] | None = None,
        source: str = "",
        overwrite: bool = False,
        annotations: bool = False,
        max_samples_per_chunk: int = MAX_SAMPLES_PER_CHUNK,
        id_chunk: int | None = None,
    ) -> None:
        if value_kind not in VALUE_KINDS:
            raise StoreError(f"value kind must be one of {VALUE_KINDS}; got {value_kind!r}")
        if dtype not in DTYPES[value_kind]:
            raise StoreError(
                f"a {value_kind} store holds {DTYPES[value_kind]}; got dtype {dtype!r}"
            )
        self.path = place(path)
        if isinstance(self.path, RemotePath):
            self.path.check_writable()
            self.path.check_bucket()
        if self.path.exists():
            check_new_store(self.path, overwrite)
            remove_tree(self.path)
        sample_ids = np.asarray(sample_ids, dtype=str)
        _check_ids(sample_ids, "sample", str(self.path))
        self.n_samples = int(sample_ids.size)
        if self.n_samples == 0:
            raise StoreError(f"{self.path}: no samples")
        self.dtype = np.dtype(dtype)
        self.value_kind = value_kind
        id_chunk = _ids.ID_CHUNK if id_chunk is None else id_chunk
        if int(max_samples_per_chunk) < 1 or int(id_chunk) < 1:
            raise StoreError(
                f"max_samples_per_chunk and id_chunk must be positive; got "
                f"{max_samples_per_chunk!r} and {id_chunk!r}"
            )
        self.chunks = chunks or default_chunks(
            self.n_samples, dtype, n_features, max_samples_per_chunk
        )
        self.source = source
        self._n_written = 0
        self._capacity = n_features if n_features is not None else self.chunks[1]
        self._annotations = annotations
        # The first refused id or chromosome, raised by finalize (after every block, as an importer's
        # parse errors come first).
        self._refused: FeatureIdError | None = None
        # Rows of X arrive in blocks of arbitrary width; buffer them to whole chunks so each chunk
        # file is written exactly once.
        self._pending: list[np.ndarray] = []
        self._pending_cols = 0

        self.group = open_group(self.path, mode="w")
        self._write_attrs(complete=False, n_features=0)
        fill = MISSING_INT8 if self.dtype == np.int8 else np.nan
        self.X = self.group.create_array(
            "X",
            shape=(self.n_samples, self._capacity),
            chunks=self.chunks,
            dtype=self.dtype,
            # The CRC-32C of each chunk ends its file (checked by every Zarr v3 reader).
            compressors=[default_codec(dtype), Crc32cCodec()],
            fill_value=fill,
            dimension_names=("sample", "feature"),
            # Every chunk is written even when all-missing, so an absent chunk file means damage.
            config={"write_empty_chunks": True},
        )
        self._crcs: dict[tuple[int, int], int] = {}
        ids = self.group.create_array(
            "samples/id", shape=(self.n_samples,), dtype=str, compressors=_CHECKED_STRINGS
        )
        ids[:] = sample_ids
        self._ids = StreamedColumn(self.group, "features/id", str, _CHECKED_STRINGS, id_chunk)
        self._chrom = StreamedColumn(self.group, "features/chrom", str, _CHECKED_STRINGS, id_chunk)
        self._pos = StreamedColumn(self.group, "features/pos", "int64", _CHECKED_NUMBERS, id_chunk)
        # Spilled id hashes: inside a local store, in the temporary folder for one on object storage.
        spill = (
            Path(tempfile.gettempdir()) / f"widescreen-id-check-{os.getpid()}-{id(self)}"
            if isinstance(self.path, RemotePath)
            else self.path / ".id-check"
        )
        self._dups = DuplicateFinder(spill)

    def _write_attrs(self, *, complete: bool, n_features: int) -> None:
        attrs = FormatAttributes(
            format_version=FORMAT_VERSION,
            value_kind=self.value_kind,
            dtype=self.dtype.name,
            n_samples=self.n_samples,
            n_features=n_features,
            missing_sentinel=MISSING_INT8 if self.dtype == np.int8 else None,
            creator=f"widescreen {__version__}",
            complete=complete,
            source=self.source,
            checksums=_checksum.CODEC,
        )
        self.group.attrs[ATTRS_KEY] = attrs.to_dict()

    def append(self, block: np.ndarray, feature_ids, chrom=None, pos=None) -> None:
        """Append a block of features.

        Parameters
        ----------
        block : ndarray of shape (n_samples, b)
            Values already in the store's dtype convention (NaN or the int8 sentinel for missing).
        feature_ids : sequence of str, of length b
        chrom, pos : sequences of length b, optional
            Annotations; required on every block when the writer was made with ``annotations=True``.
        """
        block = np.asarray(block)
        if block.ndim != 2 or block.shape[0] != self.n_samples:
            raise StoreError(
                f"{self.path}: a block must have shape ({self.n_samples}, b); got {block.shape}"
            )
        ids = np.asarray(feature_ids, dtype=str)
        if ids.size != block.shape[1]:
            raise StoreError(f"{self.path}: {block.shape[1]} columns but {ids.size} feature ids")
        self._check_block_ids(ids)
        at = self._ids.n_written + self._ids.n_held
        self._ids.add(ids)
        self._dups.add(ids)
        if self._annotations:
            chrom = np.asarray(chrom, dtype=str)
            bad = unsafe_id(chrom) if self._refused is None else None
            if bad is not None:
                self._refused = FeatureIdError(
                    f"{self.path}: chromosome {str(chrom[bad])!r} of feature {str(ids[bad])!r} "
                    f"holds {describe_unsafe(str(chrom[bad]))}",
                    "chrom",
                    str(chrom[bad]),
                    (at + bad,),
                )
            self._chrom.add(chrom)
            self._pos.add(np.asarray(pos, dtype=np.int64))
        self._pending.append(block.astype(self.dtype, copy=False))
        self._pending_cols += block.shape[1]
        if self._pending_cols >= self.chunks[1]:
            self._flush(final=False)

    def _check_block_ids(self, ids: np.ndarray) -> None:
        """Note the first empty or unsafe id (an empty one first, as `_check_ids` orders them)."""
        at = self._ids.n_written + self._ids.n_held
        if ids.size == 0 or (self._refused is not None and self._refused.kind == "empty"):
            return
        where = str(self.path)
        empty = np.flatnonzero(np.strings.str_len(as_unicode(ids)) == 0)
        if empty.size:
            i = at + int(empty[0])
            self._refused = FeatureIdError(
                f"{where}: empty feature id at position {i + 1}", "empty", "", (i,)
            )
            return
        if self._refused is not None:
            return
        bad = unsafe_id(ids)
        if bad is not None:
            v = str(ids[bad])
            self._refused = FeatureIdError(
                f"{where}: feature id {v!r} at position {at + bad + 1} holds "
                f"{describe_unsafe(v)}, which would break the output tables",
                "unsafe",
                v,
                (at + bad,),
            )

    def _flush(self, *, final: bool) -> None:
        if not self._pending:
            return
        data = np.concatenate(self._pending, axis=1) if len(self._pending) > 1 else self._pending[0]
        width = self.chunks[1]
        n_take = data.shape[1] if final else (data.shape[1] // width) * width
        if n_take == 0:
            return
        start = self._n_written
        stop = start + n_take
        if stop > self._capacity:
            self._capacity = max(stop, 2 * self._capacity)
            self.X.resize((self.n_samples, self._capacity))
        self.X[:, start:stop] = data[:, :n_take]
        self._record_crcs(start, stop)
        self._n_written = stop
        rest = data[:, n_take:]
        self._pending = [rest] if rest.shape[1] else []
        self._pending_cols = rest.shape[1]

    def _record_crcs(self, start: int, stop: int) -> None:
        """Note the CRC each chunk file just written ends with, for the table of positions."""
        rows, cols = self.chunks
        where = [
            (r, c)
            for c in range(start // cols, -(-stop // cols))
            for r in range(-(-self.n_samples // rows))
        ]
        files = [self.path / "X" / "c" / str(r) / str(c) for r, c in where]
        for (r, c), (_size, crc) in zip(where, census(files), strict=True):
            if crc is None:  # pragma: no cover - zarr always writes the codec's four bytes
                raise StoreError(f"{self.path}/X: chunk {r}/{c} was not written whole")
            self._crcs[(r, c)] = crc

    def finalize(self) -> Dataset:
        """Write the remaining columns, the feature ids and annotations, and mark the store complete."""
        self._flush(final=True)
        p = self._n_written
        if p == 0:
            raise StoreError(f"{self.path}: no features were written")
        if self._capacity != p:
            self.X.resize((self.n_samples, p))
        self._finish_ids(p)
        rows, cols = self.chunks
        grid = (-(-self.n_samples // rows), -(-p // cols))
        table = np.zeros(grid, dtype=np.uint32)
        for (r, c), crc in self._crcs.items():
            if c < grid[1]:
                table[r, c] = crc
        arr = self.group.create_array(
            _checksum.TABLE, shape=grid, dtype="uint32", chunks=grid, compressors=[Crc32cCodec()]
        )
        arr[:] = table
        self._write_attrs(complete=True, n_features=p)
        return open_dataset(self.path)

    def _finish_ids(self, p: int) -> None:
        """Write the ids' and annotations' last chunks; raise the first refused id or duplicate."""
        try:
            if self._refused is not None and self._refused.kind != "chrom":
                raise self._refused
            self._ids.finish(p)
            ids = self.group["features/id"]
            dup = self._dups.find(lambda at: as_unicode(ids.get_coordinate_selection(at)))
            if dup is not None:
                v, a, b = dup
                raise FeatureIdError(
                    f"{self.path}: duplicate feature id {v!r} at positions {a + 1} and {b + 1}",
                    "duplicate",
                    v,
                    (a, b),
                )
            if self._refused is not None:
                raise self._refused
            if self._annotations:
                self._chrom.finish(p)
                self._pos.finish(p)
        finally:
            self._dups.close()

    def abort(self) -> None:
        """Remove the partial store."""
        remove_tree(self.path)

    def __enter__(self) -> DatasetWriter:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is not None:
            self.abort()


def check_new_store(path: str | os.PathLike, overwrite: bool, error=StoreError) -> None:
    """Refuse to write a store over an existing path unless ``overwrite``, naming what is there."""
    path = place(path)
    if overwrite or not path.exists():
        return
    if _unfinished_store(path):
        raise error(
            f"{path}: holds an import that did not finish (it was stopped); an import cannot "
            "resume: use --overwrite to replace it"
        )
    raise error(f"{path}: already exists (choose another path, or --overwrite to replace it)")


def _unfinished_store(path: Path | RemotePath) -> bool:
    """Whether ``path`` is a widescreen store whose import never marked it complete."""
    try:
        meta = json.loads((path / "zarr.json").read_text(encoding="utf-8"))
        attrs = meta["attributes"][ATTRS_KEY]
        return attrs.get("complete") is False
    except (OSError, ValueError, KeyError, TypeError):
        return False


def as_unicode(values) -> np.ndarray:
    """Fixed-width unicode copy of a string array (zarr returns numpy's variable-width StringDType)."""
    a = np.asarray(values)
    if a.dtype.kind == "U":
        return a
    if a.size == 0:
        return a.astype("U1")
    width = max(int(np.strings.str_len(a).max()), 1)
    return a.astype(f"U{width}")


#: Codecs after the serialiser of the id and annotation arrays: compressed, then checksummed.
_CHECKED_STRINGS = [ZstdCodec(level=0), Crc32cCodec()]
_CHECKED_NUMBERS = [ZstdCodec(level=0), Crc32cCodec()]


#: Arrays of a store besides X: (node, required).
ID_NODES = (
    ("samples/id", True),
    ("features/id", True),
    ("features/chrom", False),
    ("features/pos", False),
)


@dataclass(frozen=True)
class Dataset:
    """An opened, complete dataset store (read-only handle).

    Attributes
    ----------
    path : Path
    attrs : FormatAttributes
    X : zarr.Array of shape (n_samples, n_features)
    """

    path: Path | RemotePath
    attrs: FormatAttributes
    X: zarr.Array

    @property
    def shape(self) -> tuple[int, int]:
        return (self.attrs.n_samples, self.attrs.n_features)

    @property
    def n_samples(self) -> int:
        return self.attrs.n_samples

    @property
    def n_features(self) -> int:
        return self.attrs.n_features

    @property
    def dtype(self) -> np.dtype:
        return np.dtype(self.attrs.dtype)

    @property
    def chunks(self) -> tuple[int, int]:
        return tuple(self.X.chunks)

    @cached_property
    def group(self) -> zarr.Group:
        # Opened once: on object storage each opening costs requests.
        return open_group(self.path, mode="r")

    def array(self, node: str) -> zarr.Array | None:
        """The array at ``node`` (``"features/id"``, ...), or None when the store has none.

        Opened once per handle: on object storage each opening (and each test whether a node exists)
        is a request, tens of milliseconds on a storage service.
        """
        arrays = self.__dict__.setdefault("_arrays", {"X": self.X})
        if node not in arrays:
            arrays[node] = _open_node(self.group, node)
        return arrays[node]

    @property
    def checksummed(self) -> bool:
        """Whether X's chunks carry CRC-32C checksums (format version 2)."""
        return _checksum.has_checksum(self.X)

    @property
    def notes(self) -> tuple[str, ...]:
        """What a user should know about this store's integrity checks."""
        if self.checksummed:
            return ()
        return (
            f"{self.path}: format version {self.attrs.format_version}, without chunk checksums: "
            "bytes changed inside a chunk are caught only when they decode to impossible values; "
            "import the data again to add checksums",
        )

    def checksum_table(self) -> np.ndarray | None:
        """CRC-32C recorded at import for each chunk of X, shape (row chunks, column chunks)."""
        if self.array(_checksum.TABLE) is None:
            return None
        return np.asarray(self._read(_checksum.TABLE, slice(None)), dtype=np.uint32)

    def _read(self, node: str, sel) -> np.ndarray:
        """Read part of a 1- or 2-dimensional node, naming the node if it is damaged.

        Coordinates (sorted) of a 1-d node are read one chunk at a time, so at most one decoded chunk
        is held whatever the array's length.
        """
        try:
            arr = self.array(node)
            if arr is None:
                raise KeyError(node)
            if isinstance(sel, np.ndarray):
                if arr.ndim != 1 or sel.size < 2:
                    return arr.get_coordinate_selection(sel)
                step = int(arr.chunks[0])
                cut = np.flatnonzero(np.diff(sel // step)) + 1
                parts = [arr.get_coordinate_selection(part) for part in np.split(sel, cut)]
                if arr.dtype.kind in "OTU" or str(arr.dtype).startswith("Str"):
                    return as_unicode(np.concatenate([as_unicode(x) for x in parts]))
                return np.concatenate(parts)
            return arr[sel]
        except Exception as exc:  # zarr raises several types for damaged chunks
            raise StoreError(
                f"{self.path}/{node}: cannot be read ({exc}); the store is damaged"
            ) from None

    def _ids(self, node: str, sel, what: str, offset) -> np.ndarray:
        ids = as_unicode(self._read(node, sel))
        _check_read_ids(ids, f"{self.path}/{node}", what, offset)
        return ids

    def sample_ids(self) -> np.ndarray:
        return self._ids("samples/id", slice(None), "sample", 0)

    def feature_ids(self, start: int = 0, stop: int | None = None) -> np.ndarray:
        return self._ids("features/id", slice(start, stop), "feature", start)

    @property
    def has_annotations(self) -> bool:
        """Whether the store has chromosome and position annotations (reads none of them)."""
        return self.array("features/chrom") is not None and self.array("features/pos") is not None

    def feature_ids_at(self, index) -> np.ndarray:
        """Ids of the given features, reading only their entries (memory independent of p).

        Read one chunk of ids at a time, so at most one decoded chunk is held whatever p is.
        """
        index = np.asarray(index, dtype=np.int64)
        if index.size == 0:
            return np.empty(0, dtype="U1")
        order = np.argsort(index, kind="stable")
        srt = index[order]
        vals = self._ids("features/id", srt, "feature", srt)
        out = np.empty_like(vals)
        out[order] = vals
        return out

    def annotations_at(self, index) -> dict[str, np.ndarray] | None:
        """Chromosome and position of the given features only, or None without annotations."""
        if not self.has_annotations:
            return None
        index = np.asarray(index, dtype=np.int64)
        order = np.argsort(index, kind="stable")
        out = {}
        for name in ("chrom", "pos"):
            if index.size == 0:
                out[name] = np.empty(0, dtype="U1" if name == "chrom" else np.int64)
                continue
            raw = self._read(f"features/{name}", index[order])
            if name == "chrom":
                vals = as_unicode(raw)
                bad = unsafe_id(vals)
                if bad is not None:
                    raise StoreError(
                        f"{self.path}/features/chrom: the chromosome of feature "
                        f"{int(index[order][bad])} holds {describe_unsafe(str(vals[bad]))}"
                    )
            else:
                vals = np.asarray(raw, dtype=np.int64)
            back = np.empty_like(vals)
            back[order] = vals
            out[name] = back
        return out

    def annotations(self) -> dict[str, np.ndarray] | None:
        """Chromosome and position per feature, or None when the store has none."""
        if not self.has_annotations:
            return None
        return {
            "chrom": as_unicode(self._read("features/chrom", slice(None))),
            "pos": np.asarray(self._read("features/pos", slice(None)), dtype=np.int64),
        }

    def _nodes(self) -> list[tuple[str, zarr.Array]]:
        names = ["X", *(n for n, _ in ID_NODES), _checksum.TABLE]
        return [(n, a) for n in names if (a := self.array(n)) is not None]

    def check_chunks(self) -> list[tuple[str, Path]]:
        """Every chunk file of every array, checked to exist: (node, path) pairs.

        Raises
        ------
        StoreError
            A chunk file is missing (named with its node; a `ChunkError` for X).
        """
        out = []
        every = [
            (name, f)
            for name, arr in self._nodes()
            for f in _checksum.chunk_files(self.path / name, tuple(arr.shape), tuple(arr.chunks))
        ]
        # On object storage: the sizes of the objects that exist (one listing where the storage lists)
        remote = isinstance(self.path, RemotePath)
        listed = self.path.sizes([f for _, f in every]) if remote else None
        for name, f in every:
            if not (f.is_file() if listed is None else str(f) in listed):
                if name == "X":
                    raise ChunkError(
                        f"missing {self._where(f)}: the store is damaged; import it again"
                    )
                root = self.path / name
                rel = "/".join(f.relative_to(root / "c").parts)
                raise StoreError(
                    f"missing chunk {rel} of {root}: the store is damaged; import it again"
                )
            out.append((name, f))
        return out

    def _where(self, f: Path) -> str:
        """A chunk of X as messages name it: position, file, features."""
        r, c = int(f.parent.name), int(f.name)
        cols = int(self.X.chunks[1])
        start, stop = c * cols, min((c + 1) * cols, self.n_features)
        return f"chunk {r}/{c} of {self.path / 'X'} (features {start}..{stop - 1})"

    def fingerprint(self) -> str:
        """A hash of the store's identity, reading no chunk.

        With checksums (format version 2): attributes, array metadata, the table of X's chunk
        checksums, and per chunk file of every array its size and last four bytes (its CRC-32C), so
        content rewritten with the same size and modification time changes it, and a chunk whose
        CRC is not the one recorded for its position (swapped, replaced) is refused here. Without:
        attributes, metadata and the chunk files' sizes and modification times, as version 1 did.

        Raises
        ------
        StoreError
            A chunk file is missing, or X's chunks do not match the recorded checksums.
        """
        files = self.check_chunks()
        h = hashlib.sha256()
        h.update(json.dumps(self.attrs.to_dict(), sort_keys=True).encode())
        h.update(json.dumps(self.X.metadata.to_dict(), sort_keys=True, default=str).encode())
        if not self.checksummed and isinstance(self.path, RemotePath):
            for f, (size, _crc) in zip(files, census([f for _, f in files]), strict=True):
                h.update(f"{f[1].relative_to(self.path)}:{size}".encode())
            return h.hexdigest()[:32]
        if not self.checksummed:
            for root in ("X", "samples", "features"):
                base = self.path / root
                for dirpath, _, names in sorted(os.walk(base)):
                    for f in sorted(names):
                        st = os.stat(os.path.join(dirpath, f))
                        rel = os.path.relpath(os.path.join(dirpath, f), self.path)
                        h.update(f"{rel}:{st.st_size}:{st.st_mtime_ns}".encode())
            return h.hexdigest()[:32]
        table = self.checksum_table()
        if table is None:
            raise StoreError(
                f"{self.path}: missing array {_checksum.TABLE!r} (the chunk checksums)"
            )
        for (name, f), (size, crc) in zip(files, census([f for _, f in files]), strict=True):
            rel = f.relative_to(self.path).as_posix()
            if name == "X":
                _check_position(self._where(f), f, crc, table)
            h.update(f"{rel}:{size}:{crc}".encode())
        h.update(table.tobytes())
        return h.hexdigest()[:32]


def _check_position(where: str, f: Path, crc: int | None, table: np.ndarray) -> None:
    r, c = int(f.parent.name), int(f.name)
    if r >= table.shape[0] or c >= table.shape[1]:
        raise ChunkError(f"corrupt {where}: the checksum table has no entry for it")
    if crc == int(table[r, c]):
        return
    others = _checksum.table_positions(table, crc) if crc is not None else []
    if others:
        at = ", ".join(f"{a}/{b}" for a, b in others[:3])
        raise ChunkError(
            f"corrupt {where}: it holds the data recorded for chunk {at} (chunks were moved or "
            "swapped); the store is damaged: import it again"
        )
    raise ChunkError(
        f"corrupt {where}: it ends with another checksum than the one recorded at import (changed "
        "or truncated); the store is damaged: import it again"
    )


def _check_read_ids(ids: np.ndarray, node: str, what: str, offset) -> None:
    """Ids as read back: none empty (what a missing chunk of another writer gives) or unsafe."""
    if ids.size == 0:
        return

    def position(i: int) -> int:
        return int(offset[i] if isinstance(offset, np.ndarray) else offset + i)

    empty = np.flatnonzero(np.strings.str_len(ids) == 0)
    if empty.size:
        raise StoreError(
            f"{node}: empty {what} id at position {position(int(empty[0])) + 1} (a missing or "
            "damaged chunk?); the store is damaged"
        )
    bad = unsafe_id(ids)
    if bad is not None:
        raise StoreError(
            f"{node}: {what} id {str(ids[bad])!r} at position {position(bad) + 1} holds "
            f"{describe_unsafe(str(ids[bad]))}, which would break the output tables"
        )


def open_dataset(path: str | os.PathLike) -> Dataset:
    """Open a complete dataset store for reading; a clear `StoreError` for anything else.

    Checks the attributes against X (value kind, dtype, shape), that every id and annotation array
    exists with the right length, and the sample ids (unique, none empty, no tab or newline); a store
    written by another program has its feature ids checked too.
    """
    path = place(path)
    if not (path / "zarr.json").is_file():
        if not path.exists() and isinstance(path, RemotePath):
            path.check_bucket()
        if not path.exists():
            raise StoreError(f"{path}: no such store")
        raise StoreError(f"{path}: not a Zarr v3 group (no zarr.json)")
    try:
        group = open_group(path, mode="r")
        raw = group.attrs.get(ATTRS_KEY)
    except Exception as exc:  # zarr raises several types for a damaged group
        raise StoreError(f"{path}: cannot open as a Zarr group: {exc}") from exc
    if raw is None:
        raise StoreError(f"{path}: not a widescreen dataset (no '{ATTRS_KEY}' attributes)")
    if not isinstance(raw, dict):
        raise StoreError(f"{path}/zarr.json: the '{ATTRS_KEY}' attributes are not a mapping")
    try:
        attrs = FormatAttributes.from_dict(dict(raw))
    except TypeError as exc:
        raise StoreError(f"{path}/zarr.json: incomplete '{ATTRS_KEY}' attributes ({exc})") from None
    if attrs.format_version not in READABLE_VERSIONS:
        raise StoreError(
            f"{path}: format version {attrs.format_version}; this widescreen reads versions "
            f"{', '.join(map(str, READABLE_VERSIONS))}"
        )
    if not attrs.complete:
        raise StoreError(f"{path}: incomplete store (its import did not finish); import it again")
    # Each node opened once and kept by the handle (on object storage an opening is a request).
    arrays = {name: _open_node(group, name) for name in ("X", *(n for n, _ in ID_NODES))}
    for name in ("X", "samples/id", "features/id"):
        if arrays[name] is None:
            raise StoreError(f"{path}: missing array {name!r}")
    X = arrays["X"]
    _check_kind(path, attrs, X)
    if tuple(X.shape) != (attrs.n_samples, attrs.n_features):
        raise StoreError(
            f"{path}: X has shape {tuple(X.shape)} but the attributes say "
            f"({attrs.n_samples}, {attrs.n_features})"
        )
    for name, required in ID_NODES:
        arr = arrays[name]
        if arr is None:
            if required:  # pragma: no cover - checked above
                raise StoreError(f"{path}: missing array {name!r}")
            continue
        want = attrs.n_samples if name.startswith("samples") else attrs.n_features
        if tuple(arr.shape) != (want,):
            raise StoreError(
                f"{path}/{name}: has shape {tuple(arr.shape)}; X's attributes need ({want},)"
            )
    if (arrays["features/chrom"] is None) != (arrays["features/pos"] is None):
        raise StoreError(f"{path}: features/chrom and features/pos must come together")
    ds = Dataset(path=path, attrs=attrs, X=X)
    ds.__dict__.update(group=group, _arrays=arrays)
    sids = ds.sample_ids()
    _check_ids(sids, "sample", f"{path}/samples/id")
    if not attrs.creator.startswith("widescreen"):
        # Written elsewhere: its ids never went through our import checks.
        _check_feature_ids_streamed(ds, f"{path}/features/id")
    return ds


def _open_node(group: zarr.Group, node: str) -> zarr.Array | None:
    """``group[node]``, or None when there is no such node (one lookup, not a test and a lookup)."""
    try:
        return group[node]
    except KeyError:
        return None


def _check_feature_ids_streamed(ds: Dataset, where: str) -> None:
    """`_check_ids` for a store's feature ids, one id chunk at a time (memory flat in p)."""
    step = int(ds.group["features/id"].chunks[0]) or 1
    folder = Path(tempfile.gettempdir()) / f"widescreen-id-check-{os.getpid()}-{id(ds)}"
    dups = DuplicateFinder(folder)
    try:
        for start in range(0, ds.n_features, step):
            dups.add(ds.feature_ids(start, min(start + step, ds.n_features)))  # empty, unsafe
        found = dups.find(ds.feature_ids_at)
    finally:
        dups.close()
    if found is not None:
        v, a, b = found
        raise StoreError(f"{where}: duplicate feature id {v!r} at positions {a + 1} and {b + 1}")


def _check_kind(path: Path, attrs: FormatAttributes, X) -> None:
    """The attributes' value kind and dtype must agree with each other and with X."""
    if attrs.value_kind not in VALUE_KINDS:
        raise StoreError(
            f"{path}/zarr.json: value_kind {attrs.value_kind!r} is not one of {VALUE_KINDS}"
        )
    if attrs.dtype not in DTYPES[attrs.value_kind]:
        raise StoreError(
            f"{path}/zarr.json: a {attrs.value_kind} store holds {' or '.join(DTYPES[attrs.value_kind])}, "
            f"but its attributes say dtype {attrs.dtype!r} (value_kind or dtype was edited?)"
        )
    stored = np.dtype(X.dtype)
    if stored != np.dtype(attrs.dtype):
        raise StoreError(
            f"{path}/X: stored as {stored.name}, but the attributes say {attrs.dtype}; "
            "the store was changed by another program"
        )
    sentinel = MISSING_INT8 if stored == np.int8 else None
    if attrs.missing_sentinel != sentinel:
        raise StoreError(
            f"{path}/zarr.json: missing_sentinel {attrs.missing_sentinel!r} does not fit a "
            f"{stored.name} store (expected {sentinel!r})"
        )
