"""What ``screen`` and ``run`` print for several traits (``--response a,b,c``), and their reports."""

from __future__ import annotations

from pathlib import Path

import typer

from ._app import shown_path


def echo_traits(result, out, report: bool, here: Path | None = None) -> None:
    """One line for the shared pass, one per trait, then a report per trait folder.

    ``out`` is the run folder as given (a path or a URL), ``here`` the local folder the run worked in
    (its local copy for a URL; ``out`` itself by default).
    """
    here = Path(out) if here is None else here
    s = result.pass_result
    if s is not None:
        typer.echo(
            f"screened {s.n_features} features for {len(result.names)} traits in one pass"
            + (
                f" [resumed {s.blocks_reused} of {s.blocks_reused + s.blocks_computed} blocks]"
                if s.blocks_reused
                else ""
            )
            + f"; summary in {out / 'traits.tsv'}, each trait in {out / 'traits'}/NAME/"
        )
    for row in result.summary:
        size = row["selected_size"]
        lam = row["lambda_gc"]
        typer.echo(
            f"  {row['trait']}: {row['n']} samples, shortlist {row['shortlist_size']}"
            + ("" if size is None else f", selected {size}")
            + (f", top {row['top_feature']}" if row["top_feature"] is not None else "")
            + ("" if lam is None else f", lambda_GC = {lam:.4f}")
        )
    if report:
        from ..report import build_report

        for name in result.names:
            typer.echo(f"report: {shown_path(out, here, build_report(here / 'traits' / name))}")
