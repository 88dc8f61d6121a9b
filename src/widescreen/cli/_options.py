"""Command-line options shared by several commands, and the checks that refuse values out of range.

Every check runs while the command line is parsed, before any work starts, and raises
`typer.BadParameter` with one line saying what was expected; typer prints it with the option's name.
Options that are off unless set show ``[default: (off)]`` in the help.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Annotated

import typer

from ..families import FAMILY_NAMES  # the names only: no kernel is imported

DATA = "Data and filters"
RUNNING = "Running"
OFF = "off"


# ------------------------------------------------------------------------------------------------
# checks (typer callbacks: value in, value or BadParameter out)


def at_least(low: int) -> Callable[[int | None], int | None]:
    """A check that an integer option is ``low`` or more (None passes: the option is off)."""

    def check(value: int | None) -> int | None:
        if value is not None and value < low:
            raise typer.BadParameter(f"must be an integer of at least {low}; got {value}")
        return value

    return check


def one_of(*choices: str) -> Callable[[str | None], str | None]:
    """A check that a text option is one of ``choices``."""

    def check(value: str | None) -> str | None:
        if value is not None and value not in choices:
            raise typer.BadParameter(f"must be one of {', '.join(choices)}; got {value!r}")
        return value

    return check


def missing_rate(value: float | None) -> float | None:
    """A share of samples: 0 <= value <= 1."""
    if value is not None and not 0.0 <= value <= 1.0:
        raise typer.BadParameter(f"a missing rate is between 0 and 1; got {value:g}")
    return value


def allele_freq(value: float | None) -> float | None:
    """A minor allele frequency: 0 <= value <= 0.5."""
    if value is not None and not 0.0 <= value <= 0.5:
        raise typer.BadParameter(f"a minor allele frequency is between 0 and 0.5; got {value:g}")
    return value


def shortlist(value: str) -> int | str:
    """``auto`` or a positive integer."""
    if value == "auto":
        return value
    try:
        k = int(value)
    except ValueError:
        k = 0
    if k < 1:
        raise typer.BadParameter(f"must be a positive integer or 'auto'; got {value!r}")
    return k


def positive(value: float) -> float:
    """A number above 0."""
    if not value > 0.0:
        raise typer.BadParameter(f"must be positive; got {value:g}")
    return value


def below_one(value: float) -> float:
    """A number in [0, 1) (a correlation that keeps a matrix positive definite)."""
    if not 0.0 <= value < 1.0:
        raise typer.BadParameter(f"must be at least 0 and below 1; got {value:g}")
    return value


def level(value: float) -> float:
    """A probability strictly between 0 and 1 (a test level or a false discovery rate)."""
    if not 0.0 < value < 1.0:
        raise typer.BadParameter(f"must be between 0 and 1 (exclusive); got {value:g}")
    return value


def stability_share(value: float) -> float:
    """A share of half-samples above one half, at most 1 (the stability threshold)."""
    if not 0.5 < value <= 1.0:
        raise typer.BadParameter(f"must be above 0.5 and at most 1; got {value:g}")
    return value


def cv_folds_check(value: int) -> int:
    """0 (off) or at least 2 folds."""
    if value == 1 or value < 0:
        raise typer.BadParameter(f"must be 0 (off) or at least 2; got {value}")
    return value


# ------------------------------------------------------------------------------------------------
# options shared by `screen` and `run`


def run_folder(value: str | None):
    """The run folder: a Path, or a `RemotePath` on object storage that can hold a run folder (a
    protocol without conditional writes is refused with the reason)."""
    if value is None:
        return None
    from ..engine import RunFolderError, run_folder_target

    try:
        return run_folder_target(value)
    except RunFolderError as exc:
        raise typer.BadParameter(str(exc)) from None


# A store is text, not a Path: it may be a URL (s3://bucket/geno.zarr), which a Path would mangle.
StoreArg = Annotated[
    str,
    typer.Argument(
        metavar="STORE",
        help="Dataset store (made by `widescreen import` or `simulate`): a folder or a URL "
        "(s3://, gs://, az://, https://).",
    ),
]
OutcomeOpt = Annotated[
    Path,
    typer.Option("--outcome", metavar="TABLE", help="Outcome table (TSV, first column sample id)."),
]
ResponseOpt = Annotated[
    str,
    typer.Option(
        "--response",
        metavar="COLUMN",
        help="Column of the response (survival: the time). Several traits: a,b,c (one pass over the "
        "store for all; each trait's results in OUT/traits/NAME/, a summary in OUT/traits.tsv); "
        "'*': every numeric column but the covariates and the event.",
    ),
]
OutOpt = Annotated[
    str,
    typer.Option(
        "--out",
        metavar="FOLDER",
        help="Run folder for the results (resumed if it exists): a folder, or an s3:// URL "
        "(worked on in a local copy, uploaded as the run goes).",
        callback=run_folder,
    ),
]
FamilyOpt = Annotated[
    str,
    typer.Option(
        "--family",
        metavar="NAME",
        # Checked where the family is looked up: an unknown name is a one-line error.
        help=f"Outcome family: {', '.join(FAMILY_NAMES)}.",
        rich_help_panel=DATA,
    ),
]
CovariatesOpt = Annotated[
    str | None,
    typer.Option(
        "--covariates",
        metavar="NAMES",
        help="Comma-separated columns to adjust for.",
        show_default=OFF,
        rich_help_panel=DATA,
    ),
]
EventOpt = Annotated[
    str | None,
    typer.Option(
        "--event",
        metavar="COLUMN",
        help="Survival: column of the event indicator (1 = event, 0 = censored).",
        show_default=OFF,
        rich_help_panel=DATA,
    ),
]
DropMissingOpt = Annotated[
    float | None,
    typer.Option(
        "--drop-missing",
        metavar="RATE",
        help="Drop features whose missing rate (share of samples without a value) exceeds RATE.",
        callback=missing_rate,
        show_default=OFF,
        rich_help_panel=DATA,
    ),
]
DropRareOpt = Annotated[
    float | None,
    typer.Option(
        "--drop-rare",
        metavar="FREQ",
        help="Dosage stores: drop features whose minor allele frequency is below FREQ.",
        callback=allele_freq,
        show_default=OFF,
        rich_help_panel=DATA,
    ),
]
ShortlistOpt = Annotated[
    str,
    typer.Option(
        "--shortlist",
        metavar="N|auto",
        help="Size of the shortlist (the size budget d): N features, or auto = floor(n / log n).",
        callback=shortlist,
    ),
]
WorkersOpt = Annotated[
    int | None,
    typer.Option(
        "--workers",
        metavar="N",
        help="Start a local cluster of N worker processes.",
        callback=at_least(1),
        show_default="off: threads on all cores",
        rich_help_panel=RUNNING,
    ),
]
SchedulerOpt = Annotated[
    str | None,
    typer.Option(
        "--scheduler",
        metavar="ADDRESS",
        help="Address of an existing Dask scheduler.",
        show_default=OFF,
        rich_help_panel=RUNNING,
    ),
]
RestartOpt = Annotated[
    bool,
    typer.Option(
        "--restart",
        help="Discard what the run folder holds and start over.",
        rich_help_panel=RUNNING,
    ),
]
QuietOpt = Annotated[
    bool,
    typer.Option(
        "--quiet",
        "-q",
        help="No progress display; only results and errors.",
        rich_help_panel=RUNNING,
    ),
]
MemoryOpt = Annotated[
    str | None,
    typer.Option(
        "--memory-budget",
        metavar="SIZE",
        help="Memory the run may use, e.g. 4GB; with --workers N it is shared by the N workers, "
        "with --scheduler ADDRESS it is one worker's.",
        show_default=OFF,
        rich_help_panel=RUNNING,
    ),
]
ReportOpt = Annotated[
    bool,
    typer.Option(
        "--report/--no-report",
        help="Write report.html and figures/ into the run folder.",
        show_default="--report",
        rich_help_panel=RUNNING,
    ),
]
