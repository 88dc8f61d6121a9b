"""The statistics of a pass (``passes/NAME/stats/``): made, read by range, read at coordinates.

One float64 array of shape (n_features,) per statistic, in store order, uncompressed with one chunk per
block, so a block task writes its chunk file directly (`widescreen.engine`). Element j belongs to the
store's feature j: `stats_frame` joins the ids. A pass over K responses at once (a response matrix)
records its kernel's statistics as arrays of shape (n_features, K), chunked (block, K) and stored row by
row (feature-major), one column per response; the readers take ``response=k`` to read column k.
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterator

import numpy as np

from ._layout import PassLayout, RunFolderError, RunLayout
from ._records import PassMeta


def create_stats(
    layout: PassLayout,
    columns,
    n_features: int,
    block_width: int,
    *,
    wide: tuple[str, ...] = (),
    n_responses: int = 0,
) -> None:
    """Make the statistics arrays of a new pass (NaN until a block writes its chunk).

    ``wide`` columns (a pass over ``n_responses`` responses) get shape (n_features, n_responses).

    Raises
    ------
    RuntimeError
        The arrays did not get the layout block tasks write directly (a zarr default changed).
    """
    import zarr

    group = zarr.open_group(layout.stats, mode="w")
    for c in columns:
        two = c in wide
        arr = group.create_array(
            c,
            shape=(n_features, n_responses) if two else (n_features,),
            chunks=(block_width, n_responses) if two else (block_width,),
            dtype="<f8",
            fill_value=np.nan,
            # Uncompressed: block tasks write their chunk files directly (see `write_stats_chunk`).
            compressors=None,
            filters=None,
        )
        if not _codecs_ok(arr):  # pragma: no cover - guards against a zarr default change
            raise RuntimeError(f"{layout.stats / c}: unexpected array layout {arr.metadata}")


def _codecs_ok(array) -> bool:
    meta = array.metadata.to_dict()
    codecs = meta.get("codecs", [])
    key = meta.get("chunk_key_encoding", {})
    return (
        len(codecs) == 1
        and codecs[0].get("name") == "bytes"
        and (codecs[0].get("configuration") or {}).get("endian", "little") == "little"
        and key.get("name") == "default"
        and (key.get("configuration") or {}).get("separator", "/") == "/"
    )


def stats_chunk_bytes(values: np.ndarray, width: int) -> bytes:
    """The bytes of one block's chunk file: little-endian float64, NaN-padded to the chunk length
    (a statistic of K responses: (width, K) values, row by row)."""
    if values.shape[0] == width:  # a whole block: one copy
        return np.asarray(values, dtype="<f8").tobytes()
    buf = np.full((width, *values.shape[1:]), np.nan, dtype="<f8")
    buf[: values.shape[0]] = values
    return buf.tobytes()


def read_pass_meta(layout: PassLayout) -> PassMeta | None:
    """The pass's `PassMeta`, or None when ``pass.json`` is absent or unreadable."""
    try:
        return PassMeta.from_dict(json.loads(layout.meta.read_text()))
    except (OSError, ValueError, KeyError, TypeError):
        return None


class PassStats:
    """Read access to a finished pass's statistics.

    Parameters
    ----------
    run : path of the run folder
    name : str
        The pass (``screen``, ``iter1``, ...).
    require_finished : bool
        Refuse a pass with unfinished blocks (their statistics are NaN).

    Raises
    ------
    RunFolderError
        No run folder, no such pass, an unreadable ``pass.json``, or unfinished blocks.
    """

    def __init__(self, run: str | os.PathLike, name: str, *, require_finished: bool = True) -> None:
        import zarr

        layout = RunLayout(run)
        if not layout.root.is_dir():
            raise RunFolderError(f"{layout.root}: no such run folder")
        self.layout = layout.pass_(name)
        self.name = name
        #: The column read by default in a pass over several responses (a trait's shared pass).
        self.response: int | None = None
        if self.layout.shared.is_file():
            self.layout, self.response = _shared(layout, self.layout)
        if not self.layout.meta.is_file():
            raise RunFolderError(f"{layout.root}: has no pass {name!r}")
        meta = read_pass_meta(self.layout)
        if meta is None:
            raise RunFolderError(f"{self.layout.meta}: unreadable")
        self.meta = meta
        if require_finished:
            finished = len([i for i in self.layout.done_blocks() if i < meta.n_blocks])
            if finished < meta.n_blocks:
                raise RunFolderError(
                    f"{layout.root}: pass {name!r} is not finished ({finished} of {meta.n_blocks} "
                    "blocks); rerun the command to resume it"
                )
        self._group = zarr.open_group(self.layout.stats, mode="r")

    @property
    def columns(self) -> tuple[str, ...]:
        return self.meta.columns

    @property
    def n_features(self) -> int:
        return self.meta.n_features

    @property
    def chunk_length(self) -> int:
        return self.meta.block_width

    def _check(self, columns) -> tuple[str, ...]:
        cols = tuple(columns) if columns is not None else self.columns
        unknown = [c for c in cols if c not in self.columns]
        if unknown:
            raise KeyError(
                f"pass {self.name!r} has no statistic {unknown[0]!r}; it has {list(self.columns)}"
            )
        return cols

    def read(
        self, columns=None, start: int = 0, stop: int | None = None, response: int | None = None
    ) -> dict[str, np.ndarray]:
        """Statistics of features ``start:stop`` (store order): dict of float64 arrays.

        ``response``: in a pass over several responses, the column of that response (statistics of
        shape (n_features,) are shared by all responses and read as they are).
        """
        return {
            c: self._damaged(c, lambda c=c: self._slice(c, slice(start, stop), response))
            for c in self._check(columns)
        }

    def _slice(self, column: str, rows, response: int | None):
        response = self.response if response is None else response
        arr = self._group[column]
        if arr.ndim == 2 and response is not None:
            return arr[rows, response]
        return arr[rows]

    def _damaged(self, column: str, read) -> np.ndarray:
        # A truncated chunk file (a machine crash) makes zarr fail to reshape it: name the array.
        try:
            return np.asarray(read(), dtype=np.float64)
        except Exception as exc:
            raise RunFolderError(
                f"{self.layout.stats / column}: cannot be read ({exc}); rerun the command to "
                "compute the damaged blocks again"
            ) from None

    def read_at(self, index, columns=None, response: int | None = None) -> dict[str, np.ndarray]:
        """Statistics of the given features only (memory independent of p), in the given order
        (``response``: as for `read`)."""
        index = np.asarray(index, dtype=np.int64)
        order = np.argsort(index, kind="stable")
        out = {}
        for c in self._check(columns):
            vals = (
                self._damaged(c, lambda c=c: self._coords(c, index[order], response))
                if index.size
                else np.empty(0)
            )
            back = np.empty_like(vals)
            back[order] = vals
            out[c] = back
        return out

    def _coords(self, column: str, index: np.ndarray, response: int | None):
        response = self.response if response is None else response
        arr = self._group[column]
        if arr.ndim == 2:
            cols = slice(None) if response is None else np.full(index.size, response)
            if response is None:
                return arr.get_orthogonal_selection((index, cols))
            return arr.get_coordinate_selection((index, cols))
        return arr.get_coordinate_selection(index)

    def blocks(self, columns=None, step: int = 1 << 20) -> Iterator[tuple[int, int, dict]]:
        """(start, stop, statistics) of consecutive ranges of whole chunks, about ``step`` features."""
        cols = self._check(columns)
        w = self.chunk_length
        step = max(w, -(-step // w) * w)
        for start in range(0, self.n_features, step):
            stop = min(start + step, self.n_features)
            yield start, stop, self.read(cols, start, stop)


def _shared(layout: RunLayout, own: PassLayout) -> tuple[PassLayout, int]:
    """The pass a ``shared.json`` points to (another run folder's, one response of it)."""
    try:
        rec = json.loads(own.shared.read_text())
        target = RunLayout((layout.root / rec["run"]).resolve()).pass_(own.root.name)
        return target, int(rec["response"])
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise RunFolderError(f"{own.shared}: unreadable ({exc})") from None


def shared_record(run: str, response: int) -> str:
    """The text of a ``shared.json``: the pass is column ``response`` of the pass of the same name in
    the run folder ``run`` (a path relative to the sharing run folder)."""
    return json.dumps({"run": run, "response": int(response)})


def read_stats(
    run,
    name: str,
    columns: tuple[str, ...] | None = None,
    start: int = 0,
    stop: int | None = None,
    response: int | None = None,
) -> dict[str, np.ndarray]:
    """Statistics of a finished pass by range (see `PassStats.read`)."""
    return PassStats(getattr(run, "path", run), name).read(columns, start, stop, response)


def read_stats_at(
    run, name: str, index, columns=None, response: int | None = None
) -> dict[str, np.ndarray]:
    """Statistics of a finished pass at the given features (see `PassStats.read_at`)."""
    return PassStats(getattr(run, "path", run), name).read_at(index, columns, response)


def stats_frame(
    run: str | os.PathLike,
    name: str = "screen",
    columns=None,
    start: int = 0,
    stop: int | None = None,
    store: str | os.PathLike | None = None,
):
    """A pass's statistics as a pandas DataFrame indexed by feature id, with the store ``index``.

    The ids come from the store (by default where the manifest says the run found it). Read by range
    so a very wide pass can be read piece by piece.
    """
    import pandas as pd

    from ..store._format import open_dataset

    stats = PassStats(run, name)
    stop = stats.n_features if stop is None else min(stop, stats.n_features)
    if store is None:
        manifest = json.loads(RunLayout(run).manifest.read_text())
        store = manifest.get("dataset", {}).get("path")
    ids = open_dataset(store).feature_ids(start, stop)
    frame = pd.DataFrame(stats.read(columns, start, stop))
    frame.insert(0, "index", np.arange(start, stop, dtype=np.int64))
    frame.index = pd.Index(ids, name="feature", dtype="string")
    return frame


__all__ = [
    "PassStats",
    "create_stats",
    "read_pass_meta",
    "read_stats",
    "read_stats_at",
    "shared_record",
    "stats_chunk_bytes",
    "stats_frame",
]
