"""Plain-text tables of a run folder: the writers and readers live in `widescreen.schema`."""

from __future__ import annotations

from ..schema._tables import format_value, read_tsv, tsv

__all__ = ["format_value", "read_tsv", "tsv"]
