"""Split delimited text into fields and convert cells, a batch at a time with numpy byte operations.

A batch of bytes is cut at a line end (or, inside a very long line, at a delimiter). The positions of
delimiters and newlines give every field's byte range, line and column at once; numeric cells are then
converted in a few numpy passes over all cells of the batch, so no Python code runs per cell.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from ._format import MISSING_INT8
from ._ingest_base import Source

#: Bytes of text parsed per batch.
BATCH_BYTES = 8 * 2**20
#: Numeric cells longer than this are parsed one by one (keeps the byte matrices small).
LONG_CELL = 32
_SLICE = 2**18  # cells converted per numpy call
_MAX_MATRIX = 2**21  # cells x width of one byte matrix (its index array takes 8 bytes per entry)
_PLAIN_WIDTH = 17  # sign, 15 digits and a point
_POW10 = 10.0 ** np.arange(16)
_NL, _CR, _QUOTE = 10, 13, 34


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


class BadText(ValueError):
    """A cell is not UTF-8 text: ``cell`` is its index among the cells given, ``byte`` the value."""

    def __init__(self, cell: int, byte: int, at: int) -> None:
        super().__init__(f"not UTF-8 text (byte 0x{byte:02x} at character {at + 1} of the cell)")
        self.cell, self.byte, self.at = cell, byte, at


def _first_bad_utf8(buf: np.ndarray, start: np.ndarray, stop: np.ndarray) -> BadText:
    """The first of these cells that is not UTF-8 (only called once decoding them has failed)."""
    hi = np.flatnonzero(
        np.add.reduceat((buf >= 128).astype(np.int64), np.r_[start, buf.size][:-1])[: start.size]
        if start.size
        else np.zeros(0)
    )
    for i in hi:  # only cells with non-ASCII bytes, up to the first that fails
        raw = buf[start[i] : stop[i]].tobytes()
        try:
            raw.decode("utf-8")
        except UnicodeDecodeError as exc:
            return BadText(int(i), raw[exc.start], exc.start)
    return BadText(0, 0, 0)  # pragma: no cover - decoding failed, so some cell is bad


def decode_cells(buf: np.ndarray, start: np.ndarray, stop: np.ndarray) -> np.ndarray:
    """Id cells as a unicode array, one surrounding pair of double quotes removed.

    Raises
    ------
    BadText
        A cell is not UTF-8, with its index (the caller knows its line and column).
    """
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
        try:
            if w * length[sl].size > _MAX_MATRIX:  # some very long ids: decode them one by one
                cells = [
                    buf[a:b].tobytes().decode("utf-8")
                    for a, b in zip(start[sl], stop[sl], strict=True)
                ]
                out.append(np.asarray(cells, dtype=str))
                continue
            s = byte_strings(buf, start[sl], length[sl], w)
            ascii_only = not np.any(s.view(np.uint8) >= 128)
            out.append(s.astype(f"U{w}") if ascii_only else np.strings.decode(s, "utf-8"))
        except UnicodeDecodeError:
            bad = _first_bad_utf8(buf, start[sl], stop[sl])
            bad.cell += s0
            raise bad from None
    return np.concatenate(out) if len(out) > 1 else out[0]


def parse_numbers(buf: np.ndarray, start: np.ndarray, stop: np.ndarray) -> tuple[np.ndarray, int]:
    """Numeric cells as float64 (missing tokens -> NaN) and the index of the first bad cell, or -1.

    Plain decimals (``-12.5``, at most 15 digits) are converted by `_plain_decimals`; every other
    cell (exponents, ``inf``, missing tokens, bad text) goes through numpy's string cast.
    """
    out = np.empty(start.size, np.float64)
    nul = np.flatnonzero(buf == 0)
    if nul.size and start.size:
        # A NUL byte inside a cell would vanish in the fixed-width casts below (NUL is their padding).
        cell = np.searchsorted(start, nul, side="right") - 1
        inside = (cell >= 0) & (nul < stop[np.maximum(cell, 0)])
        if inside.any():
            first = int(cell[inside].min())
            upto, bad = parse_numbers(buf, start[:first], stop[:first]) if first else (out[:0], -1)
            out[:first] = upto
            return out, bad if bad >= 0 else first
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
