"""Reports of a run: tables and pictures."""

from ._tables import format_value, read_tsv, tsv

__all__ = ["format_value", "read_tsv", "tsv"]
