"""``widescreen run``: iterative screening (screen, fit, conditional pass, refit, ...) into a run folder."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from ._app import MemoryOpt, ReportOpt, _budget, _covariates, _parse_keep, _scheduler, app, friendly
from ._progress import ProgressBar

_MODEL = "Model and tuning"
_THRESH = "Thresholds"
_DATA = "Data and filters"
_RUN = "Running"


@app.command("run")
@friendly
def run_cmd(
    store: Annotated[
        Path, typer.Argument(help="Dataset store (made by `widescreen import` or `simulate`).")
    ],
    outcome: Annotated[
        Path, typer.Option("--outcome", help="Outcome table (TSV, first column sample id).")
    ],
    response: Annotated[
        str, typer.Option("--response", help="Column of the response (survival: the time).")
    ],
    out: Annotated[
        Path, typer.Option("--out", help="Run folder for the results (resumed if it exists).")
    ],
    family: Annotated[
        str,
        typer.Option(
            "--family",
            help="Outcome family: linear, logistic, poisson, cox, rank, rank-utility, dcor, spline, holp.",
            rich_help_panel=_DATA,
        ),
    ] = "linear",
    covariates: Annotated[
        str | None,
        typer.Option(
            "--covariates", help="Comma-separated columns to adjust for.", rich_help_panel=_DATA
        ),
    ] = None,
    event: Annotated[
        str | None,
        typer.Option(
            "--event", help="Survival: column of the event indicator.", rich_help_panel=_DATA
        ),
    ] = None,
    max_missing: Annotated[
        float | None,
        typer.Option(
            "--max-missing",
            help="Exclude features missing in more than this share of samples.",
            rich_help_panel=_DATA,
        ),
    ] = None,
    min_maf: Annotated[
        float | None,
        typer.Option(
            "--min-maf",
            help="Dosage stores: exclude features with minor allele frequency below this.",
            rich_help_panel=_DATA,
        ),
    ] = None,
    penalty: Annotated[
        str,
        typer.Option(
            "--penalty",
            help="Refit penalty: scad, mcp, lasso, enet, adaptive_lasso or dantzig.",
            rich_help_panel=_MODEL,
        ),
    ] = "scad",
    criterion: Annotated[
        str,
        typer.Option(
            "--criterion", help="Tuning of the refit: ebic, bic or cv.", rich_help_panel=_MODEL
        ),
    ] = "ebic",
    keep: Annotated[
        str,
        typer.Option(
            "--keep",
            help="Size budget d of the selected set: N or 'auto' = floor(n / log n).",
            rich_help_panel=_MODEL,
        ),
    ] = "auto",
    max_iter: Annotated[
        int,
        typer.Option(
            "--max-iter",
            help="Conditional passes at most (0: plain SIS and one fit).",
            rich_help_panel=_MODEL,
        ),
    ] = 5,
    split: Annotated[
        bool,
        typer.Option(
            "--split",
            help="Screen two random halves of the samples; keep features in both top lists.",
            rich_help_panel=_MODEL,
        ),
    ] = False,
    seed: Annotated[
        int,
        typer.Option(
            "--seed", help="Seed of the halves, permutations and CV folds.", rich_help_panel=_MODEL
        ),
    ] = 0,
    threshold: Annotated[
        str,
        typer.Option(
            "--threshold",
            help="Cut within the budget: none, permutation, bonferroni or bh.",
            rich_help_panel=_THRESH,
        ),
    ] = "none",
    permutations: Annotated[
        int,
        typer.Option(
            "--permutations",
            help="Permuted responses per pass (--threshold permutation).",
            rich_help_panel=_THRESH,
        ),
    ] = 100,
    alpha: Annotated[
        float,
        typer.Option(
            "--alpha",
            help="Level: family-wise (permutation, bonferroni) or false discovery rate (bh).",
            rich_help_panel=_THRESH,
        ),
    ] = 0.05,
    workers: Annotated[
        int | None,
        typer.Option(
            "--workers", help="Start a local cluster of N worker processes.", rich_help_panel=_RUN
        ),
    ] = None,
    scheduler: Annotated[
        str | None,
        typer.Option(
            "--scheduler", help="Address of an existing Dask scheduler.", rich_help_panel=_RUN
        ),
    ] = None,
    restart: Annotated[
        bool,
        typer.Option(
            "--restart",
            help="Discard what the run folder holds and start over.",
            rich_help_panel=_RUN,
        ),
    ] = False,
    quiet: Annotated[
        bool,
        typer.Option(
            "--quiet",
            "-q",
            help="No progress bar; only results and errors.",
            rich_help_panel=_RUN,
        ),
    ] = False,
    memory_budget: MemoryOpt = None,
    report: ReportOpt = True,
) -> None:
    """Iterative screening: screen, fit a penalised model, rank the rest given it, refit, repeat.

    Writes model.tsv (the final model), iterations.tsv (one row per iteration), ranking.tsv (the first
    screen's shortlist) and manifest.json into the run folder; rerunning resumes pass by pass.
    """
    from ..workflow._iterate import IterateConfig
    from ..workflow._run import run

    if max_iter < 0:
        raise typer.BadParameter(f"--max-iter must be 0 or more; got {max_iter}")
    config = IterateConfig(
        response=response,
        family=family,
        covariates=_covariates(covariates),
        event=event,
        keep=_parse_keep(keep),
        penalty=penalty,
        criterion=criterion,
        max_iter=max_iter,
        threshold=threshold,
        alpha=alpha,
        n_permutations=permutations,
        split=split,
        seed=seed,
        max_missing=max_missing,
        min_maf=min_maf,
    )
    result = run(
        store,
        outcome,
        config,
        out,
        scheduler=_scheduler(workers, scheduler),
        progress=lambda name: ProgressBar(name, quiet),
        restart=restart,
        memory_budget=_budget(memory_budget),
    )
    rep = result.problem.joined.report()
    shown = ", ".join(str(f) for f in result.feature_ids[:10])
    more = f" and {result.index.size - 10} more" if result.index.size > 10 else ""
    typer.echo(
        f"{len(result.iterations)} iteration(s) on {rep['n_analysed']} samples, size budget "
        f"{result.budget}; stopped: {result.stop_reason}; selected {result.index.size} "
        f"feature(s){': ' + shown + more if shown else ''}; model in {out / 'model.tsv'}"
    )
    if report:
        from ..report import build_report

        typer.echo(f"report: {build_report(out)}")
