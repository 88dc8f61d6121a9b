"""Reading a few features' columns from a block source: the one column reader.

A pass keeps the values of its top list; everything else that needs a handful of columns (the
features kept by reused blocks, the survivors of sample splitting, the selected features after
splitting, the estimators' ``transform``) reads them here, each block once, in one of three forms:

``"raw"``
    As stored (int8 with the missing sentinel, or floats with NaN), in the store's dtype.
``"float"``
    Float64 with NaN for a missing value.
``"prepared"``
    Imputed and centred float64 values with their summaries (`Columns`), each column prepared within
    the same sub-block as a pass prepares it, so the values are bit-identical to those a pass keeps.
"""

from __future__ import annotations

import threading
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from ..store import MISSING_INT8, prepare_block
from ._source import BlockSource

KINDS = ("raw", "float", "prepared")


@dataclass(frozen=True)
class Columns:
    """Imputed, centred float64 values of a few features on the analysed rows, with their summaries.

    Attributes
    ----------
    index : ndarray of int of shape (m,)
    values : ndarray of shape (n, m), Fortran order
    mean, sumsq, missing_rate : ndarray of shape (m,)
    constant : ndarray of bool of shape (m,)
    """

    index: np.ndarray
    values: np.ndarray
    mean: np.ndarray
    sumsq: np.ndarray
    missing_rate: np.ndarray
    constant: np.ndarray


def read_columns(
    source: BlockSource,
    index: np.ndarray,
    *,
    rows: np.ndarray | None = None,
    kind: str = "prepared",
    sub_block: int = 1024,
    n_threads: int = 1,
) -> np.ndarray | Columns:
    """Read the given features once (each block read once) in the form ``kind``.

    Parameters
    ----------
    source : BlockSource
    index : ndarray of int of shape (m,)
        Feature indices, in the order wanted (repeats allowed).
    rows : ndarray of int, optional
        Rows of the analysed samples; all rows when None.
    kind : {"raw", "float", "prepared"}
        See the module's docstring.
    sub_block : int
        ``"prepared"``: the sub-block width of the pass whose values are to be matched.
    n_threads : int
        Blocks read at once.

    Returns
    -------
    ndarray of shape (n, m) (``"raw"``, ``"float"``), or `Columns` (``"prepared"``)

    Raises
    ------
    IndexError
        An index outside the source's features.
    """
    if kind not in KINDS:
        raise ValueError(f"kind must be one of {KINDS}; got {kind!r}")
    index = np.asarray(index, dtype=np.int64).ravel()
    m = index.size
    if m and (index.min() < 0 or index.max() >= source.n_features):
        raise IndexError(f"feature indices must lie in 0..{source.n_features - 1}")
    n = source.n_samples if rows is None else len(rows)
    prepared = kind == "prepared"
    if kind == "raw":
        values = None  # in the dtype of the first block read (all blocks of a source share it)
        lock = threading.Lock()
    else:
        values = np.empty((n, m), dtype=np.float64, order="F")
    if prepared:
        mean, sumsq, miss = np.empty(m), np.empty(m), np.empty(m)
        constant = np.zeros(m, dtype=bool)
    blocks = index // source.block_width

    def one(i: int) -> None:
        nonlocal values
        start, stop = source.bounds(i)
        raw = source.read(i)
        sel = np.flatnonzero(blocks == i)
        local = index[sel] - start
        if not prepared:
            cols = raw[:, local] if rows is None else raw[:, local][rows]
            if kind == "float":
                missing = cols == MISSING_INT8 if cols.dtype == np.int8 else None
                cols = cols.astype(np.float64)
                if missing is not None:
                    cols[missing] = np.nan
            else:
                with lock:
                    if values is None:
                        values = np.empty((n, m), dtype=cols.dtype, order="F")
            values[:, sel] = cols
            return
        for a in np.unique(local // sub_block * sub_block):
            b = min(int(a) + sub_block, stop - start)
            blk = prepare_block(raw[:, a:b], start + int(a), rows)
            here = (local >= a) & (local < b)
            pos, col = sel[here], local[here] - a
            values[:, pos] = blk.columns(col)
            mean[pos], sumsq[pos] = blk.mean[col], blk.sumsq[col]
            miss[pos], constant[pos] = blk.missing_rate[col], blk.constant[col]

    todo = [int(i) for i in np.unique(blocks)]
    if n_threads <= 1 or len(todo) <= 1:
        for i in todo:
            one(i)
    else:
        # Each thread decodes into its own reused buffers; the columns written are disjoint.
        with ThreadPoolExecutor(max_workers=n_threads) as pool:
            list(pool.map(one, todo))
    if values is None:  # nothing to read
        values = np.empty((n, 0), dtype=np.float64)
    if not prepared:
        return values
    return Columns(index, values, mean, sumsq, miss, constant)


__all__ = ["KINDS", "Columns", "read_columns"]
