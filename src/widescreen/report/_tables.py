"""Plain-text tables of a run folder (tab-separated, one header row)."""

from __future__ import annotations

import numpy as np


def format_value(v) -> str:
    """Numbers with 10 significant digits (enough to re-rank and to compare runs), NaN as 'NA'."""
    if isinstance(v, str):
        return v
    if isinstance(v, bool | np.bool_):
        return "1" if v else "0"
    if isinstance(v, int | np.integer):
        return str(int(v))
    f = float(v)
    if not np.isfinite(f):
        return "NA" if np.isnan(f) else ("inf" if f > 0 else "-inf")
    return f"{f:.10g}"


def tsv(columns: dict[str, np.ndarray | list]) -> str:
    """A TSV text from equal-length columns, in the dict's order."""
    names = list(columns)
    if not names:
        return ""
    cols = [list(columns[c]) for c in names]
    n = len(cols[0])
    if any(len(c) != n for c in cols):
        raise ValueError("table columns differ in length")
    lines = ["\t".join(names)]
    for i in range(n):
        lines.append("\t".join(format_value(c[i]) for c in cols))
    return "\n".join(lines) + "\n"


def read_tsv(path) -> dict[str, np.ndarray]:
    """Read a table written by `tsv` back into string columns."""
    with open(path) as f:
        header = f.readline().rstrip("\n").split("\t")
        rows = [line.rstrip("\n").split("\t") for line in f if line.strip()]
    arr = np.array(rows, dtype=str).reshape(len(rows), len(header))
    return {h: arr[:, j] for j, h in enumerate(header)}
