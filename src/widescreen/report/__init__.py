"""Reports of a run: tables and pictures.

The tables load eagerly; the pictures and the page (matplotlib, scipy.stats) load on first use, so
importing the workflow does not pay for them.
"""

from importlib import import_module

from ._tables import format_value, read_tsv, tsv

_LAZY = {
    "ReportError": "._build",
    "ReportFiles": "._build",
    "build_report": "._build",
    "make_report": "._build",
    "criterion_plot": "._plots",
    "iterations_plot": "._plots",
    "lambda_path_plot": "._plots",
    "manhattan_plot": "._plots",
    "png_bytes": "._plots",
    "qq_plot": "._plots",
    "save_png": "._plots",
    "score_histogram": "._plots",
    "selection_trace_plot": "._plots",
    "lambda_gc": "._stats",
    "qq_points": "._stats",
    "thin_mask": "._stats",
}


def __getattr__(name: str):
    if name in _LAZY:
        value = getattr(import_module(_LAZY[name], __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


__all__ = [
    "ReportError",
    "ReportFiles",
    "build_report",
    "criterion_plot",
    "format_value",
    "iterations_plot",
    "lambda_gc",
    "lambda_path_plot",
    "make_report",
    "manhattan_plot",
    "png_bytes",
    "qq_plot",
    "qq_points",
    "read_tsv",
    "save_png",
    "score_histogram",
    "selection_trace_plot",
    "thin_mask",
    "tsv",
]
