"""The ``report`` command: pictures and a self-contained HTML page of a finished run."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from ._app import command, lambda_gc_line
from ._options import at_least


@command("report")
def report_cmd(
    run: Annotated[
        Path, typer.Argument(metavar="RUN", help="Run folder of a finished `screen` or `run`.")
    ],
    top: Annotated[
        int,
        typer.Option(
            "--top",
            metavar="N",
            help="Rows of the ranking table shown on the page.",
            callback=at_least(1),
        ),
    ] = 50,
) -> None:
    """Write RUN/report.html (pictures embedded) and the pictures as PNG under RUN/figures/."""
    from ..report._build import make_report

    files = make_report(run, top)
    typer.echo(f"report: {files.html}")
    for path in files.figures:
        typer.echo(f"figure: {path}")
    if files.lambda_gc is not None:
        typer.echo(lambda_gc_line(files.lambda_gc))
