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
import shutil
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import zarr
from zarr.codecs import BloscCodec

from .._version import __version__

FORMAT_VERSION = 1
ATTRS_KEY = "widescreen"
MISSING_INT8 = -128
VALUE_KINDS = ("dosage", "continuous")
DTYPES = {"dosage": ("int8",), "continuous": ("float32", "float64")}

#: Target size of one chunk of X in bytes; the design aims at 8-64 MiB chunks.
TARGET_CHUNK_BYTES = 16 * 2**20
#: Above this many samples X is chunked over samples as well.
MAX_SAMPLES_PER_CHUNK = 65_536


class StoreError(ValueError):
    """A dataset store is missing, incomplete, of an unknown version or damaged."""


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


def default_chunks(n_samples: int, dtype: str, n_features: int | None = None) -> tuple[int, int]:
    """Chunk shape for X: all samples (up to a cap) times as many features as fit the target size.

    When the number of features is known and small, chunks are narrowed so that a pass still has at
    least about eight blocks to spread over the cores (but never below 256 features).
    """
    rows = min(max(n_samples, 1), MAX_SAMPLES_PER_CHUNK)
    itemsize = np.dtype(dtype).itemsize
    cols = max(64, TARGET_CHUNK_BYTES // (rows * itemsize))
    if n_features is not None:
        cols = min(cols, max(256, n_features // 8))
    cols = int(2 ** np.floor(np.log2(cols)))  # powers of two keep block plans aligned
    return rows, cols


def _check_ids(ids: np.ndarray, what: str, where: str) -> None:
    if ids.size == 0:
        return
    uniq, _first, counts = np.unique(ids, return_index=True, return_counts=True)
    if np.any(counts > 1):
        dup = str(uniq[counts > 1][0])
        pos = np.flatnonzero(ids == dup)[:2]
        raise StoreError(
            f"{where}: duplicate {what} id {dup!r} at positions {pos[0] + 1} and {pos[1] + 1}"
        )
    empty = np.flatnonzero(np.char.str_len(ids.astype(str)) == 0)
    if empty.size:
        raise StoreError(f"{where}: empty {what} id at position {empty[0] + 1}")


class DatasetWriter:
    """Write a dataset store feature block by feature block, with bounded memory.

    The store is created incomplete; `finalize` writes the feature ids and marks it complete. If the
    writer is closed without `finalize` (an error, a kill), the partial store stays marked incomplete
    and `open_dataset` refuses it.

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
    ) -> None:
        if value_kind not in VALUE_KINDS:
            raise StoreError(f"value kind must be one of {VALUE_KINDS}; got {value_kind!r}")
        if dtype not in DTYPES[value_kind]:
            raise StoreError(
                f"a {value_kind} store holds {DTYPES[value_kind]}; got dtype {dtype!r}"
            )
        self.path = Path(path)
        if self.path.exists():
            if not overwrite:
                if _unfinished_store(self.path):
                    raise StoreError(
                        f"{self.path}: holds an import that did not finish (it was stopped); an "
                        "import cannot resume: use --overwrite to replace it"
                    )
                raise StoreError(f"{self.path}: already exists (choose another path or overwrite)")
            shutil.rmtree(self.path)
        sample_ids = np.asarray(sample_ids, dtype=str)
        _check_ids(sample_ids, "sample", str(self.path))
        self.n_samples = int(sample_ids.size)
        if self.n_samples == 0:
            raise StoreError(f"{self.path}: no samples")
        self.dtype = np.dtype(dtype)
        self.value_kind = value_kind
        self.chunks = chunks or default_chunks(self.n_samples, dtype, n_features)
        self.source = source
        self._n_written = 0
        self._capacity = n_features if n_features is not None else self.chunks[1]
        self._feature_ids: list[np.ndarray] = []
        self._chrom: list[np.ndarray] = []
        self._pos: list[np.ndarray] = []
        self._annotations = annotations
        # Rows of X arrive in blocks of arbitrary width; buffer them to whole chunks so each chunk
        # file is written exactly once.
        self._pending: list[np.ndarray] = []
        self._pending_cols = 0

        self.group = zarr.open_group(self.path, mode="w")
        self._write_attrs(complete=False, n_features=0)
        fill = MISSING_INT8 if self.dtype == np.int8 else np.nan
        self.X = self.group.create_array(
            "X",
            shape=(self.n_samples, self._capacity),
            chunks=self.chunks,
            dtype=self.dtype,
            compressors=default_codec(dtype),
            fill_value=fill,
            dimension_names=("sample", "feature"),
            # Every chunk is written even when all-missing, so an absent chunk file means damage.
            config={"write_empty_chunks": True},
        )
        ids = self.group.create_array("samples/id", shape=(self.n_samples,), dtype=str)
        ids[:] = sample_ids

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
        self._feature_ids.append(ids)
        if self._annotations:
            self._chrom.append(np.asarray(chrom, dtype=str))
            self._pos.append(np.asarray(pos, dtype=np.int64))
        self._pending.append(block.astype(self.dtype, copy=False))
        self._pending_cols += block.shape[1]
        if self._pending_cols >= self.chunks[1]:
            self._flush(final=False)

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
        self._n_written = stop
        rest = data[:, n_take:]
        self._pending = [rest] if rest.shape[1] else []
        self._pending_cols = rest.shape[1]

    def finalize(self) -> Dataset:
        """Write the remaining columns, the feature ids and annotations, and mark the store complete."""
        self._flush(final=True)
        p = self._n_written
        if p == 0:
            raise StoreError(f"{self.path}: no features were written")
        if self._capacity != p:
            self.X.resize((self.n_samples, p))
        ids = np.concatenate(self._feature_ids)
        _check_ids(ids, "feature", str(self.path))
        _write_strings(self.group, "features/id", ids)
        if self._annotations:
            _write_strings(self.group, "features/chrom", np.concatenate(self._chrom))
            pos = self.group.create_array("features/pos", shape=(p,), dtype="int64")
            pos[:] = np.concatenate(self._pos)
        self._write_attrs(complete=True, n_features=p)
        return open_dataset(self.path)

    def abort(self) -> None:
        """Remove the partial store."""
        shutil.rmtree(self.path, ignore_errors=True)

    def __enter__(self) -> DatasetWriter:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is not None:
            self.abort()


def _unfinished_store(path: Path) -> bool:
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


def _write_strings(group: zarr.Group, name: str, values: np.ndarray) -> None:
    # Chunked so that ten million ids do not become one huge object.
    arr = group.create_array(
        name, shape=values.shape, dtype=str, chunks=(min(max(values.size, 1), 1_048_576),)
    )
    arr[:] = values


@dataclass(frozen=True)
class Dataset:
    """An opened, complete dataset store (read-only handle).

    Attributes
    ----------
    path : Path
    attrs : FormatAttributes
    X : zarr.Array of shape (n_samples, n_features)
    """

    path: Path
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

    @property
    def group(self) -> zarr.Group:
        return zarr.open_group(self.path, mode="r")

    def sample_ids(self) -> np.ndarray:
        return as_unicode(self.group["samples/id"][:])

    def feature_ids(self, start: int = 0, stop: int | None = None) -> np.ndarray:
        return as_unicode(self.group["features/id"][start:stop])

    def feature_ids_at(self, index) -> np.ndarray:
        """Ids of the given features, reading only their entries (memory independent of p)."""
        index = np.asarray(index, dtype=np.int64)
        if index.size == 0:
            return np.empty(0, dtype="U1")
        order = np.argsort(index, kind="stable")
        vals = as_unicode(self.group["features/id"].get_coordinate_selection(index[order]))
        out = np.empty_like(vals)
        out[order] = vals
        return out

    def annotations_at(self, index) -> dict[str, np.ndarray] | None:
        """Chromosome and position of the given features only, or None without annotations."""
        g = self.group
        if "features/chrom" not in g or "features/pos" not in g:
            return None
        index = np.asarray(index, dtype=np.int64)
        order = np.argsort(index, kind="stable")
        out = {}
        for name, conv in (("chrom", as_unicode), ("pos", lambda a: np.asarray(a, dtype=np.int64))):
            if index.size == 0:
                out[name] = np.empty(0, dtype="U1" if name == "chrom" else np.int64)
                continue
            vals = conv(g[f"features/{name}"].get_coordinate_selection(index[order]))
            back = np.empty_like(vals)
            back[order] = vals
            out[name] = back
        return out

    def annotations(self) -> dict[str, np.ndarray] | None:
        """Chromosome and position per feature, or None when the store has none."""
        g = self.group
        if "features/chrom" not in g or "features/pos" not in g:
            return None
        return {
            "chrom": as_unicode(g["features/chrom"][:]),
            "pos": np.asarray(g["features/pos"][:], dtype=np.int64),
        }

    def fingerprint(self) -> str:
        """A hash of the store's identity: attributes, array metadata and the chunk files' sizes and times.

        Cheap (no chunk is read) yet changes whenever X is rewritten.
        """
        h = hashlib.sha256()
        h.update(json.dumps(self.attrs.to_dict(), sort_keys=True).encode())
        h.update(json.dumps(self.X.metadata.to_dict(), sort_keys=True, default=str).encode())
        for root in ("X", "samples", "features"):
            base = self.path / root
            for dirpath, _, files in sorted(os.walk(base)):
                for f in sorted(files):
                    st = os.stat(os.path.join(dirpath, f))
                    rel = os.path.relpath(os.path.join(dirpath, f), self.path)
                    h.update(f"{rel}:{st.st_size}:{st.st_mtime_ns}".encode())
        return h.hexdigest()[:32]


def open_dataset(path: str | os.PathLike) -> Dataset:
    """Open a complete dataset store for reading; a clear `StoreError` for anything else."""
    path = Path(path)
    if not path.exists():
        raise StoreError(f"{path}: no such store")
    if not (path / "zarr.json").is_file():
        raise StoreError(f"{path}: not a Zarr v3 group (no zarr.json)")
    try:
        group = zarr.open_group(path, mode="r")
    except Exception as exc:  # zarr raises several types for a damaged group
        raise StoreError(f"{path}: cannot open as a Zarr group: {exc}") from exc
    raw = group.attrs.get(ATTRS_KEY)
    if raw is None:
        raise StoreError(f"{path}: not a widescreen dataset (no '{ATTRS_KEY}' attributes)")
    attrs = FormatAttributes.from_dict(dict(raw))
    if attrs.format_version != FORMAT_VERSION:
        raise StoreError(
            f"{path}: format version {attrs.format_version}; this widescreen reads {FORMAT_VERSION}"
        )
    if not attrs.complete:
        raise StoreError(f"{path}: incomplete store (its import did not finish); import it again")
    for name in ("X", "samples/id", "features/id"):
        if name not in group:
            raise StoreError(f"{path}: missing array {name!r}")
    X = group["X"]
    if tuple(X.shape) != (attrs.n_samples, attrs.n_features):
        raise StoreError(
            f"{path}: X has shape {tuple(X.shape)} but the attributes say "
            f"({attrs.n_samples}, {attrs.n_features})"
        )
    return Dataset(path=path, attrs=attrs, X=X)
