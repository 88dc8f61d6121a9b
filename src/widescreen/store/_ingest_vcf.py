"""Import a VCF 4.x file (plain, gzip or bgzip) into an int8 dosage store, streaming.

Rules
-----
* Sample ids are the columns after FORMAT on the ``#CHROM`` header line; ``##`` meta lines are skipped.
* The dosage of a call is the number of alternate alleles in its GT: phased (``|``) and unphased (``/``)
  alike, any ploidy (a haploid ``1`` is 1, a haploid ``0`` is 0, ``0/1/1`` is 2). A call with more
  than two alternate alleles (``1/1/1``; with ``split``, more than two copies of one ALT) is refused
  with its line and sample: a dosage store holds 0, 1 and 2 only. A call with any ``.`` allele (``.``,
  ``./.``, ``0/.``), or whose sample field stops before the GT key, is missing (-128).
* GT is located per line from the FORMAT column, so it need not be the first key. A line whose FORMAT
  has no GT is an error.
* Multi-allelic sites (ALT ``A,T``), by ``multiallelic``:

  - ``"split"`` (default): one feature per ALT allele, whose dosage counts that allele only; a
    ``1/2`` call gives 1 for the first ALT's feature and 1 for the second's.
  - ``"nonref"``: one feature, the count of non-reference alleles (``1/2`` -> 2).
  - ``"skip"``: such sites are left out.

  A site with ALT ``.`` (no alternate allele) is one feature, all 0 where called.
* Imputed data (``values="ds"``): where a site's FORMAT has a DS key, its values are read as
  dosages (the expected count of the ALT allele, a number of 0 or more; ``.`` or a field that stops
  before DS is missing) and the store holds float32 dosages (NaN for missing); sites without DS take
  their dosage from GT as above. A multi-allelic site's DS holds one value per ALT (``0.9,0.1``):
  ``split`` gives each ALT's feature its value, ``nonref`` their sum.
* ``pass_only``: sites whose FILTER is not ``PASS`` are left out (``.``, filters not applied, too).
* Feature ids: the ID column, or ``CHROM:POS:REF:ALT`` when it is ``.`` or ``id_from="position"``.
  A split site's features get ``ID:ALT`` (or ``CHROM:POS:REF:ALT``) each. Duplicate ids are an error
  naming both lines. Annotations ``chrom`` and ``pos`` (the POS column) are stored for every feature.

Speed: the text is parsed in batches of whole lines with numpy byte operations; Python code runs per
line (the nine fixed columns), never per call.

* Fixed-width lines (FORMAT ``GT`` alone, every call three characters such as ``0|1`` or ``./.``): the
  sample part of the line is exactly 4n - 1 bytes, so it is copied into an (n, 4) byte matrix and the
  calls are read from its columns.
* Any other line: tab positions give every sample field at once and the GT start of each (the g-th
  colon for GT in FORMAT position g); the usual calls (``a|b``, ``a/b`` with one-digit alleles or
  ``.``, haploid ``a``) are decoded from fixed offsets after that start. Only unusual calls
  (multi-digit alleles, more than two alleles) go through a Python parse.
"""

from __future__ import annotations

import itertools
import os
import re

import numpy as np

from ._format import MISSING_INT8, Dataset, DatasetWriter, FeatureIdError, check_new_store
from ._ingest_base import (
    IngestError,
    LineLog,
    Progress,
    Source,
    check_unique,
    chunk_shape,
    decode_utf8,
    id_error,
)

#: Bytes of VCF text parsed per batch.
BATCH_BYTES = 4 * 2**20
ID_FROM = ("column", "position")
MULTIALLELIC = ("split", "nonref", "skip")
VALUES = ("gt", "ds")
#: Longest DS value read (characters); longer ones are an error, not a silent truncation.
DS_WIDTH = 32
FIXED = ("#CHROM", "POS", "ID", "REF", "ALT", "QUAL", "FILTER", "INFO", "FORMAT")
_TAB, _NL, _CR, _COLON, _DOT, _BAR, _SLASH, _ZERO = 9, 10, 13, 58, 46, 124, 47, 48
_ABSENT, _MISSING = -2, -1  # allele codes: no such allele (lower ploidy) / '.'
_BAD = -3
# Byte -> allele code (digit value, -1 for '.', _BAD otherwise) and byte -> "ends a GT".
_CODE = np.full(256, _BAD, np.int16)
_CODE[_ZERO : _ZERO + 10] = np.arange(10)
_CODE[_DOT] = _MISSING
_ENDS = np.zeros(256, bool)
_ENDS[[_COLON, _TAB, _NL, _CR]] = True
_GT_END = re.compile(rb"[:\t\r\n]")
_ALLELE_SEP = re.compile(rb"[|/]")


def _read_header(source: Source, name: str) -> tuple[np.ndarray, bytes, int]:
    """Skip meta lines; return the sample ids, the bytes after the header and its line count."""
    buf, pos, line_no = b"", 0, 0
    while True:
        nl = buf.find(b"\n", pos)
        if nl < 0:
            chunk = source.read(BATCH_BYTES)
            if not chunk:
                if pos >= len(buf):
                    raise IngestError(f"{name}: no '#CHROM' header line (empty or not a VCF)")
                buf, pos = buf[pos:] + b"\n", 0
            else:
                buf, pos = buf[pos:] + chunk, 0
            continue
        line = buf[pos:nl].rstrip(b"\r")
        line_no += 1
        pos = nl + 1
        if line.startswith(b"##"):
            continue
        if not line.startswith(b"#CHROM"):
            raise IngestError(
                f"{name}: line {line_no}: expected '##' meta lines and then the '#CHROM' header; "
                f"got {line[:40].decode('utf-8', 'replace')!r}"
            )
        cols = decode_utf8(line, f"{name}: line {line_no}", b"\t").split("\t")
        if tuple(cols[:9]) != FIXED[: len(cols[:9])] or len(cols) < 10:
            raise IngestError(
                f"{name}: line {line_no}: the header must read {' '.join(FIXED)} followed by "
                f"at least one sample id (tab-separated); got {' '.join(cols[:10])!r}"
            )
        samples = np.asarray(cols[9:], dtype=str)
        empty = np.flatnonzero(np.char.str_len(samples) == 0)
        if empty.size:
            raise IngestError(f"{name}: line {line_no}, column {empty[0] + 10}: empty sample id")
        check_unique(samples, lambda i, ln=line_no: f"line {ln}, column {i + 10}", name, "sample")
        return samples, buf[pos:], line_no


class _Parser:
    """Turn batches of whole VCF data lines into dosage rows and feature ids / annotations."""

    def __init__(
        self,
        name: str,
        samples: np.ndarray,
        id_from: str,
        multiallelic: str,
        values: str = "gt",
        pass_only: bool = False,
    ) -> None:
        self.name = name
        self.samples = samples
        self.n = samples.size
        self.by_position = id_from == "position"
        self.multiallelic = multiallelic
        self.values = values
        self.pass_only = pass_only
        self.key_index: dict[bytes, tuple[int, int]] = {}
        self.n_lines = 0
        self.n_not_pass = 0  # sites left out by pass_only
        self.n_ds = 0  # sites read from DS

    def fail(self, line: int, msg: str, sample: int | None = None) -> IngestError:
        where = f"{self.name}: line {line}"
        if sample is not None:
            where += f", column {sample + 10} (sample {str(self.samples[sample])!r})"
        return IngestError(f"{where}: {msg}")

    def _keys(self, fmt: bytes, line: int) -> tuple[int, int]:
        """Positions of GT and (when DS is wanted) DS in a FORMAT, -1 where absent."""
        found = self.key_index.get(fmt)
        if found is None:
            keys = fmt.split(b":")
            g = keys.index(b"GT") if b"GT" in keys else -1
            d = keys.index(b"DS") if self.values == "ds" and b"DS" in keys else -1
            if g < 0 and d < 0:
                want = "GT or DS key" if self.values == "ds" else "GT key"
                raise self.fail(line, f"FORMAT {fmt.decode('utf-8', 'replace')!r} has no {want}")
            found = self.key_index[fmt] = (g, d)
        return found

    @property
    def dtype(self) -> str:
        return "float32" if self.values == "ds" else "int8"

    def _empty(self):
        rows = np.empty((0, self.n), self.dtype)
        return rows, [], [], np.empty(0, np.int64), np.empty(0, np.int64)

    def parse(self, buf: bytes, line0: int):
        """Parse whole lines (``buf`` ends with a newline); ``line0`` is the 1-based first line.

        Sets ``n_lines`` to the number of lines in ``buf`` (blank ones included).

        Returns
        -------
        rows : ndarray of shape (k, n_samples), int8 (float32 when reading DS)
        ids, chrom : list of str, of length k
        pos : ndarray of shape (k,), int64
        lines : ndarray of shape (k,), int64 (1-based line of each feature)
        """
        a = np.frombuffer(buf, np.uint8)
        nl = np.flatnonzero(a == _NL)
        ls = np.r_[0, nl[:-1] + 1]
        line_no = line0 + np.arange(nl.size)
        self.n_lines = nl.size
        keep = nl > ls + (a[np.maximum(nl - 1, 0)] == _CR)  # skip blank lines
        nl, ls, line_no = nl[keep], ls[keep], line_no[keep]
        m = nl.size
        if m == 0:
            return self._empty()
        first = np.array([self._first_sample(buf, ls[i], nl[i], line_no[i]) for i in range(m)])
        meta = [self._fixed(buf[ls[i] : first[i] - 1], int(line_no[i])) for i in range(m)]
        if self.pass_only:
            ok = np.array([x[7] for x in meta])
            self.n_not_pass += int(np.count_nonzero(~ok))
            if not ok.all():
                nl, ls, line_no, first = nl[ok], ls[ok], line_no[ok], first[ok]
                meta = [x for x, k in zip(meta, ok, strict=True) if k]
                if not meta:
                    return self._empty()
        if self.values == "gt":
            return self._from_gt(buf, a, ls, nl, first, meta, line_no)
        by_ds = np.array([x[6] >= 0 for x in meta])
        self.n_ds += int(np.count_nonzero(by_ds))
        parts = []
        for sel, fn in ((~by_ds, self._from_gt), (by_ds, self._from_ds)):
            k = np.flatnonzero(sel)
            if k.size:
                sub = [meta[i] for i in k]
                if fn == self._from_ds:
                    part = fn(buf, ls[k], nl[k], sub, line_no[k])
                else:
                    part = fn(buf, a, ls[k], nl[k], first[k], sub, line_no[k])
                    rows = part[0].astype(np.float32)
                    rows[part[0] == MISSING_INT8] = np.nan
                    part = (rows, *part[1:])
                parts.append(part)
        if len(parts) == 1:
            return parts[0]
        # Both kinds in one batch: back into file order (a line's features stay together).
        order = np.argsort(np.concatenate([x[4] for x in parts]), kind="stable")
        ids = [i for x in parts for i in x[1]]
        chrom = [c for x in parts for c in x[2]]
        return (
            np.concatenate([x[0] for x in parts])[order],
            [ids[i] for i in order],
            [chrom[i] for i in order],
            np.concatenate([x[3] for x in parts])[order],
            np.concatenate([x[4] for x in parts])[order],
        )

    def _from_gt(self, buf: bytes, a: np.ndarray, ls, nl, first, meta, line_no):
        """Dosage rows of lines read from GT (offsets into ``buf``/``a``)."""
        n, m = self.n, len(meta)
        g = np.array([x[5] for x in meta])
        alleles = np.full((2, m, n), _ABSENT, np.int16)
        slow = np.ones(m, bool)
        # Fast path: FORMAT is GT alone and every call has 3 characters ("0|1"), so the sample
        # part of the line is exactly 4n - 1 bytes and each call sits at a fixed offset.
        fixed = np.flatnonzero((nl - first == 4 * n - 1) & (g == 0))
        if fixed.size:
            codes, good = self._fixed_width(a, first[fixed])
            alleles[:, fixed[good]] = codes[:, good]
            slow[fixed[good]] = False
        slow = np.flatnonzero(slow)
        if slow.size:
            sub = b"".join(buf[ls[i] : nl[i] + 1] for i in slow)
            codes = self._general(sub, [meta[i] for i in slow], line_no[slow])
            if codes.shape[0] > alleles.shape[0]:
                wide = np.full((codes.shape[0], m, n), _ABSENT, np.int16)
                wide[: alleles.shape[0]] = alleles
                alleles = wide
            alleles[: codes.shape[0], slow] = codes.reshape(codes.shape[0], slow.size, n)
        return self._rows(alleles.reshape(alleles.shape[0], m * n), meta, line_no)

    def _first_sample(self, buf: bytes, start: int, stop: int, line: int) -> int:
        """Byte offset of the first sample field of a line (after the ninth tab)."""
        p = start
        for _ in range(9):
            p = buf.find(b"\t", p, stop)
            if p < 0:
                raise self._columns_error(buf, start, stop, line)
            p += 1
        return p

    def _columns_error(self, buf: bytes, start: int, stop: int, line: int) -> IngestError:
        hint = " (a '#' line after the header?)" if buf[start : start + 1] == b"#" else ""
        n_cols = buf.count(b"\t", start, stop) + 1
        return self.fail(
            line,
            f"{n_cols} tab-separated columns; expected {9 + self.n} "
            f"(9 fixed and {self.n} samples){hint}",
        )

    def _fixed_width(self, a: np.ndarray, first: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Allele codes (2, lines, n) of lines laid out as "a|b\ta/b\t...\n", and which lines are."""
        n = self.n
        M = np.empty((first.size, 4 * n), np.uint8)
        for r, s in enumerate(first):  # one copy per line, no per-sample work
            M[r] = a[s : s + 4 * n]
        M = M.reshape(first.size, n, 4)
        d0, d2 = _CODE[M[..., 0]], _CODE[M[..., 2]]
        ok = (d0 != _BAD) & (d2 != _BAD) & ((M[..., 1] == _BAR) | (M[..., 1] == _SLASH))
        ok[:, :-1] &= M[:, :-1, 3] == _TAB
        ok[:, -1] &= M[:, -1, 3] == _NL
        return np.stack([d0, d2]), ok.all(axis=1)

    def _general(self, sub: bytes, meta, line_no) -> np.ndarray:
        """Allele codes (ploidy, lines * n) of whole lines in any layout."""
        n = self.n
        a = np.frombuffer(sub + b"\0\0\0\0", np.uint8)  # padding: fixed-offset looks stay inside
        nl = np.flatnonzero(a == _NL)
        ls = np.r_[0, nl[:-1] + 1]
        tabs = np.flatnonzero(a == _TAB)
        n_tabs = np.searchsorted(tabs, nl) - np.searchsorted(tabs, ls)
        bad = np.flatnonzero(n_tabs != 8 + n)
        if bad.size:
            i = bad[0]
            raise self._columns_error(sub, int(ls[i]), int(nl[i]), int(line_no[i]))
        T = tabs.reshape(nl.size, 8 + n)
        return self._alleles(a, T, nl, meta, line_no)

    def _fixed(self, text: bytes, line: int):
        """The fixed columns: (chrom, pos, id, ref, alts, GT index, DS index, FILTER is PASS)."""
        chrom, pos, vid, ref, alt, _qual, filt, _info, fmt = text.split(b"\t")
        if not pos.isdigit():
            raise self.fail(line, f"POS {pos.decode('utf-8', 'replace')!r} is not a whole number")
        if not chrom or not ref or not alt:
            raise self.fail(line, "empty CHROM, REF or ALT")
        alts = [] if alt == b"." else alt.split(b",")
        where = f"{self.name}: line {line}"
        for col, field in enumerate((chrom, vid, ref, alt)):
            if not field.isascii():
                decode_utf8(field, f"{where}, column {(1, 3, 4, 5)[col]}")
        g, d = self._keys(fmt, line)
        return chrom.decode(), int(pos), vid.decode(), ref.decode(), alts, g, d, filt == b"PASS"

    def _alleles(self, a, T, nl, meta, line_no) -> np.ndarray:
        """Allele codes of every call, shape (ploidy, m * n): index, -1 for '.', -2 for none."""
        n = self.n
        start = (T[:, 8:] + 1).ravel()
        g = np.array([x[5] for x in meta])
        gs = start
        absent = None
        if np.any(g > 0):  # GT not first: the (g)th colon inside the field precedes it
            stop = np.concatenate([T[:, 9:], nl[:, None]], axis=1).ravel()
            colons = np.flatnonzero(a == _COLON)
            gf = np.repeat(g, n)
            sel = np.flatnonzero(gf > 0)
            j = np.searchsorted(colons, start[sel]) + gf[sel] - 1
            at = colons[np.minimum(j, colons.size - 1)] if colons.size else stop[sel]
            found = (j < colons.size) & (at < stop[sel])
            gs = start.copy()
            gs[sel] = np.where(found, at + 1, stop[sel])
            absent = np.zeros(start.size, bool)
            absent[sel] = ~found
        # Look at fixed offsets from each GT start: "a|b" / "a/b" then a terminator, or "a" alone.
        d0, c1, d2, c3 = _CODE[a[gs]], a[gs + 1], _CODE[a[gs + 2]], a[gs + 3]
        hap = _ENDS[c1] & (d0 != _BAD)
        dip = ((c1 == _BAR) | (c1 == _SLASH)) & _ENDS[c3] & (d0 != _BAD) & (d2 != _BAD)
        out = np.empty((2, start.size), np.int16)
        out[0] = d0
        out[1] = np.where(dip, d2, _ABSENT)
        fast = dip | hap
        if absent is not None:
            out[0, absent] = _MISSING
            fast |= absent
        if not fast.all():
            out = self._slow_alleles(a, gs, np.flatnonzero(~fast), out, line_no)
        return out

    def _slow_alleles(self, a, gs, slow, out, line_no) -> np.ndarray:
        buf = a.tobytes()
        parsed = []
        for f in slow:
            s = int(gs[f])
            e = _GT_END.search(buf, s).start()
            gt = buf[s:e]
            line, sample = int(line_no[f // self.n]), int(f % self.n)
            parts = _ALLELE_SEP.split(gt)
            if not gt or not all(x == b"." or x.isdigit() for x in parts):
                text = gt.decode("utf-8", "replace")
                raise self.fail(line, f"genotype {text!r} is not like 0/1, 0|1, 1 or ./.", sample)
            parsed.append([_MISSING if x == b"." else int(x) for x in parts])
        ploidy = max(2, *(len(x) for x in parsed))
        if ploidy > out.shape[0]:
            wide = np.full((ploidy, out.shape[1]), _ABSENT, out.dtype)
            wide[: out.shape[0]] = out
            out = wide
        for f, codes in zip(slow, parsed, strict=True):
            out[:, f] = _ABSENT
            out[: len(codes), f] = codes
        return out

    def _check_dosage_range(self, dosage: np.ndarray, missing: np.ndarray, line_no) -> None:
        """Refuse calls counting more than two alternate alleles (polyploid calls)."""
        over = np.argwhere((dosage > 2) & ~missing)
        if over.size:
            i, s = (int(v) for v in over[0])
            raise self.fail(
                int(line_no[i]),
                f"a call with {int(dosage[i, s])} alternate alleles; a dosage store holds 0, 1 "
                "or 2 (polyploid calls cannot be stored)",
                s,
            )

    def _rows(self, alleles: np.ndarray, meta, line_no):
        n, m = self.n, len(meta)
        n_alt = np.array([len(x[4]) for x in meta])
        top = alleles.max(axis=0).reshape(m, n)
        over = np.argwhere(top > n_alt[:, None])
        if over.size:
            i, s = over[0]
            raise self.fail(
                int(line_no[i]),
                f"allele index {top[i, s]} but the site has {n_alt[i]} ALT allele(s)",
                int(s),
            )
        missing = (alleles == _MISSING).any(axis=0).reshape(m, n)
        nonref = (alleles >= 1).sum(axis=0, dtype=np.int8).reshape(m, n)
        multi = n_alt > 1
        counts = self._counts(meta)
        self._check_dosage_range(nonref, missing, line_no)
        nonref[missing] = MISSING_INT8
        rows = np.repeat(nonref, counts, axis=0) if np.any(counts != 1) else nonref
        offsets = np.r_[0, np.cumsum(counts)[:-1]]
        al = alleles.reshape(alleles.shape[0], m, n)
        for i in np.flatnonzero(multi & (counts > 1)):  # split: each ALT's own count
            for k in range(counts[i]):
                d = (al[:, i] == k + 1).sum(axis=0, dtype=np.int8)
                self._check_dosage_range(d[None], missing[i][None], line_no[i : i + 1])
                rows[offsets[i] + k] = np.where(missing[i], np.int8(MISSING_INT8), d)
        return (rows, *self._names(meta, counts, line_no))

    def _counts(self, meta) -> np.ndarray:
        """Features per line: one, one per ALT (split), or none (a skipped multi-allelic site)."""
        n_alt = np.array([len(x[4]) for x in meta])
        multi = n_alt > 1
        if self.multiallelic == "split":
            return np.where(multi, n_alt, 1)
        if self.multiallelic == "skip":
            return np.where(multi, 0, 1)
        return np.ones(len(meta), np.int64)

    def _names(self, meta, counts: np.ndarray, line_no: np.ndarray):
        """Ids, chromosomes, positions and line numbers of the features of ``meta``'s lines."""
        ids, chrom = [], []
        for i, x in enumerate(meta):
            ch, pos, vid, ref, alts = x[:5]
            if counts[i] == 0:
                continue
            split = len(alts) > 1 and self.multiallelic == "split"
            named = vid if vid != "." and not self.by_position else ""
            for alt in alts if split else [b",".join(alts) or b"."]:
                alt = alt.decode()
                if split:
                    ids.append(f"{named}:{alt}" if named else f"{ch}:{pos}:{ref}:{alt}")
                else:
                    ids.append(named or f"{ch}:{pos}:{ref}:{alt}")
                chrom.append(ch)
        pos = np.repeat(np.array([x[1] for x in meta], np.int64), counts)
        return ids, chrom, pos, np.repeat(line_no, counts)

    def _from_ds(self, buf: bytes, ls, nl, meta, line_no):
        """Float32 dosage rows of lines read from their DS field (NaN for missing)."""
        n, m = self.n, len(meta)
        sub = b"".join(buf[ls[i] : nl[i] + 1] for i in range(m))
        a = np.frombuffer(sub, np.uint8)
        nl = np.flatnonzero(a == _NL)
        ls = np.r_[0, nl[:-1] + 1]
        tabs = np.flatnonzero(a == _TAB)
        n_tabs = np.searchsorted(tabs, nl) - np.searchsorted(tabs, ls)
        bad = np.flatnonzero(n_tabs != 8 + n)
        if bad.size:
            i = bad[0]
            raise self._columns_error(sub, int(ls[i]), int(nl[i]), int(line_no[i]))
        T = tabs.reshape(m, 8 + n)
        start = T[:, 8:] + 1  # (m, n) first byte of each sample field
        stop = np.concatenate([T[:, 9:], nl[:, None]], axis=1)
        stop[:, -1] -= a[nl - 1] == _CR  # a Windows line end is not part of the last field
        d = np.array([x[6] for x in meta])[:, None]
        colons = np.flatnonzero(a == _COLON)
        if colons.size == 0:
            colons = np.array([a.size], np.int64)
        # DS is the d-th key: it starts after the d-th colon of the field (at the start for d = 0).
        j = np.searchsorted(colons, start) + d - 1
        at = np.where(d > 0, colons[np.minimum(j, colons.size - 1)] + 1, start)
        present = (d == 0) | ((j < colons.size) & (at <= stop))
        k = np.searchsorted(colons, at)
        end = np.minimum(
            np.where(k < colons.size, colons[np.minimum(k, colons.size - 1)], stop), stop
        )
        length = np.where(present, end - at, 0)
        counts = self._counts(meta)
        n_alt = np.array([max(len(x[4]), 1) for x in meta])
        values = np.full((m, n), np.nan)
        simple = n_alt == 1
        if simple.any():
            values[simple] = self._ds_numbers(a, at[simple], length[simple], line_no[simple])
        rows = np.repeat(values, counts, axis=0).astype(np.float32)
        offsets = np.r_[0, np.cumsum(counts)[:-1]]
        for i in np.flatnonzero(~simple & (counts > 0)):  # several ALTs: one value per ALT
            per_alt = self._ds_per_alt(a, at[i], length[i], n_alt[i], int(line_no[i]))
            if counts[i] == 1:  # nonref: the expected count of any ALT allele
                rows[offsets[i]] = per_alt.sum(axis=1)
            else:
                rows[offsets[i] : offsets[i] + counts[i]] = per_alt.T
        return (rows, *self._names(meta, counts, line_no))

    def _ds_numbers(self, a: np.ndarray, at: np.ndarray, length: np.ndarray, line_no) -> np.ndarray:
        """DS values (one per call) from their byte offsets; NaN for '.' and absent fields."""
        width = int(length.max()) if length.size else 0
        if width > DS_WIDTH:
            i, s = np.argwhere(length == width)[0]
            raise self.fail(int(line_no[i]), f"DS value longer than {DS_WIDTH} characters", int(s))
        missing = (length == 0) | ((length == 1) & (a[np.minimum(at, a.size - 1)] == _DOT))
        if width == 0:
            return np.full(at.shape, np.nan)
        # One fixed-width byte string per call (NUL-padded), converted by numpy in one go.
        idx = at[..., None] + np.arange(width)
        text = np.where(np.arange(width) < length[..., None], a[np.minimum(idx, a.size - 1)], 0)
        text[missing] = 0
        text[missing, 0] = _ZERO
        strings = np.ascontiguousarray(text.astype(np.uint8)).view(f"S{width}")[..., 0]
        try:
            out = strings.astype(np.float64)
        except ValueError:
            out = None
        if out is None or not np.all((out >= 0) & np.isfinite(out)):
            for (i, s), v in np.ndenumerate(strings):
                try:
                    ok = float(v) >= 0 and np.isfinite(float(v))
                except ValueError:
                    ok = False
                if not ok:
                    text_v = v.decode("utf-8", "replace")
                    raise self.fail(
                        int(line_no[i]), f"DS {text_v!r} is not a dosage (a number, 0 or more)", s
                    )
        out[missing] = np.nan
        return out

    def _ds_per_alt(self, a: np.ndarray, at: np.ndarray, length: np.ndarray, n_alt: int, line: int):
        """DS values of a multi-allelic line, shape (n_samples, n_alt): one per ALT allele."""
        out = np.full((self.n, n_alt), np.nan)
        raw = a.tobytes()
        for s in range(self.n):
            text = raw[at[s] : at[s] + length[s]]
            if not text or text == b".":
                continue
            parts = text.split(b",")
            try:
                vals = [float(x) for x in parts]
            except ValueError:
                vals = []
            if len(vals) != n_alt or not all(v >= 0 and np.isfinite(v) for v in vals):
                raise self.fail(
                    line,
                    f"DS {text.decode('utf-8', 'replace')!r} is not {n_alt} dosages "
                    "(one per ALT allele, each 0 or more)",
                    s,
                )
            out[s] = vals
        return out


def _batches(source: Source, head: bytes):
    """Whole-line batches of bytes, the first starting with ``head``."""
    carry = head
    while True:
        chunk = source.read(BATCH_BYTES)
        if not chunk:
            if carry:
                yield carry if carry.endswith(b"\n") else carry + b"\n"
            return
        buf = carry + chunk
        cut = buf.rfind(b"\n") + 1
        if cut == 0:  # a line longer than the batch: read on
            carry = buf
            continue
        carry = buf[cut:]
        yield buf[:cut]


def import_vcf(
    src: str | os.PathLike,
    store: str | os.PathLike,
    *,
    id_from: str = "column",
    multiallelic: str = "split",
    values: str = "gt",
    pass_only: bool = False,
    chunk_features: int | None = None,
    overwrite: bool = False,
    progress: Progress = None,
) -> Dataset:
    """Import the genotypes of a VCF file as a dosage store with chrom / pos annotations.

    Parameters
    ----------
    src : path
        VCF 4.x text, plain or gzip / bgzip compressed (recognised by its magic bytes).
    store : path
        Folder of the new dataset store.
    id_from : {"column", "position"}
        Feature ids from the ID column (``CHROM:POS:REF:ALT`` where it is ``.``), or always
        ``CHROM:POS:REF:ALT``.
    multiallelic : {"split", "nonref", "skip"}
        Rule for sites with several ALT alleles (see the module notes).
    values : {"gt", "ds"}
        ``"gt"``: dosages counted from the genotype calls, stored as int8. ``"ds"``: the DS field
        (imputed dosages) where a site's FORMAT has it, GT elsewhere, stored as float32.
    pass_only : bool
        Leave out sites whose FILTER is not ``PASS``.
    chunk_features : int, optional
        Features per chunk of X. By default `default_chunks` for the number of features, which is
        estimated from the first chunk's worth of sites and the file size (exact for a file that
        fits in one chunk), so a small file is not stored in a chunk wider than itself.
    overwrite : bool
        Replace an existing store at ``store``.
    progress : callable(done, total), optional
        Called after each batch with the bytes of the file read so far and its size.

    Returns
    -------
    Dataset
        The complete store (n_samples, n_features): int8 with -128 for missing calls, or float32
        with NaN when reading DS.
    """
    name = str(src)
    if id_from not in ID_FROM:
        raise IngestError(f"id_from must be one of {ID_FROM}; got {id_from!r}")
    if multiallelic not in MULTIALLELIC:
        raise IngestError(f"multiallelic must be one of {MULTIALLELIC}; got {multiallelic!r}")
    if values not in VALUES:
        raise IngestError(f"values must be one of {VALUES}; got {values!r}")
    if not os.path.isfile(name):
        raise IngestError(f"{name}: no such file")
    check_new_store(store, overwrite, IngestError)
    source = Source(name)
    lines = LineLog(store)
    try:
        samples, head, n_header = _read_header(source, name)
        parser = _Parser(name, samples, id_from, multiallelic, values, pass_only)
        batches = _parsed(source, head, parser, n_header + 1, progress)
        first, chunks = _first_chunk(batches, source, samples.size, parser.dtype, chunk_features)
        n_sites = 0
        with DatasetWriter(
            store,
            samples,
            "dosage",
            parser.dtype,
            chunks=chunks,
            source=name,
            overwrite=overwrite,
            annotations=True,
        ) as writer:
            for rows, ids, chrom, pos, at in itertools.chain(first, batches):
                writer.append(rows.T, ids, chrom, pos)
                lines.add(at)
                n_sites += len(ids)
            if not n_sites:
                why = (
                    f" ({parser.n_not_pass} site(s) left out: FILTER not PASS)"
                    if parser.n_not_pass
                    else ""
                )
                raise IngestError(f"{name}: no variant lines after the header{why}")
            try:
                return writer.finalize()
            except FeatureIdError as exc:
                err = id_error(exc, lambda i: f"line {lines.at(i)}", name)
                if err is exc:  # a chromosome: the writer's message
                    raise
                hint = (
                    ""
                    if id_from == "position"
                    else " (id_from='position' builds ids from CHROM:POS:REF:ALT)"
                )
                raise IngestError(f"{err}{hint}") from None
    finally:
        lines.close()
        source.close()


def _parsed(source: Source, head: bytes, parser: _Parser, line: int, progress: Progress):
    """Parsed batches that hold at least one feature: (rows, ids, chrom, pos, lines)."""
    for buf in _batches(source, head):
        rows, ids, chrom, pos, lines = parser.parse(buf, line)
        line += parser.n_lines
        if progress is not None:
            progress(source.tell(), source.size)
        if ids:
            yield rows, ids, chrom, pos, lines


def _first_chunk(batches, source: Source, n: int, dtype: str, chunk_features: int | None):
    """Read ahead about one chunk of features to size the chunks by the data.

    Returns the batches read and the chunk shape: `default_chunks` for the number of features,
    which is known when the file ends within the read-ahead and otherwise estimated from the share
    of the file read so far (the read-ahead holds at most one target chunk of values).
    """
    if chunk_features is not None:
        return [], chunk_shape(n, dtype, chunk_features)
    target = chunk_shape(n, dtype, None)[1]
    first, count = [], 0
    for item in batches:
        first.append(item)
        count += len(item[1])
        if count >= target:
            read = max(source.tell(), 1)
            return first, chunk_shape(n, dtype, None, max(count, count * source.size // read))
    return first, chunk_shape(n, dtype, None, max(count, 1))
