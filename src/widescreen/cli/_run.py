"""``widescreen run``: iterative screening (screen, fit, conditional pass, refit, ...) into a run folder."""

from __future__ import annotations

from typing import Annotated

import typer

from ._app import (
    budget_of,
    command,
    covariates_of,
    first_lambda_gc,
    lambda_gc_line,
    scheduler_of,
    shown_path,
)
from ._options import (
    CovariatesOpt,
    DropMissingOpt,
    DropRareOpt,
    EventOpt,
    FamilyOpt,
    MemoryOpt,
    OutcomeOpt,
    OutOpt,
    QuietOpt,
    ReportOpt,
    ResponseOpt,
    RestartOpt,
    SchedulerOpt,
    ShortlistOpt,
    StoreArg,
    WorkersOpt,
    at_least,
    cv_folds_check,
    level,
    stability_share,
)
from ._progress import progress_display

_MODEL = "Model and tuning"
_THRESH = "Thresholds"
_TRUST = "Stability and validation"


@command("run")
def run_cmd(
    store: StoreArg,
    outcome: OutcomeOpt,
    response: ResponseOpt,
    out: OutOpt,
    family: FamilyOpt = "linear",
    covariates: CovariatesOpt = None,
    event: EventOpt = None,
    drop_missing: DropMissingOpt = None,
    drop_rare: DropRareOpt = None,
    penalty: Annotated[
        str,
        typer.Option(
            "--penalty",
            metavar="NAME",
            help="Refit penalty: scad, mcp, lasso, enet, adaptive_lasso or dantzig.",
            rich_help_panel=_MODEL,
        ),
    ] = "scad",
    shortlist: ShortlistOpt = "auto",
    criterion: Annotated[
        str,
        typer.Option(
            "--criterion",
            metavar="NAME",
            help="Tuning of the refit: ebic, bic or cv.",
            rich_help_panel=_MODEL,
        ),
    ] = "ebic",
    max_iter: Annotated[
        int,
        typer.Option(
            "--max-iter",
            metavar="N",
            help="Conditional passes at most (0: plain SIS and one fit).",
            callback=at_least(0),
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
            "--seed",
            metavar="N",
            help="Seed of the halves, permutations and CV folds.",
            callback=at_least(0),
            rich_help_panel=_MODEL,
        ),
    ] = 0,
    threshold: Annotated[
        str,
        typer.Option(
            "--threshold",
            metavar="RULE",
            help="Cut within the budget: none, permutation, bonferroni or bh.",
            rich_help_panel=_THRESH,
        ),
    ] = "none",
    permutations: Annotated[
        int,
        typer.Option(
            "--permutations",
            metavar="K",
            help="Permuted responses per pass (--threshold permutation).",
            callback=at_least(1),
            rich_help_panel=_THRESH,
        ),
    ] = 100,
    alpha: Annotated[
        float,
        typer.Option(
            "--alpha",
            metavar="LEVEL",
            help="Level: family-wise (permutation, bonferroni) or false discovery rate (bh).",
            callback=level,
            rich_help_panel=_THRESH,
        ),
    ] = 0.05,
    stability: Annotated[
        int,
        typer.Option(
            "--stability",
            metavar="B",
            help="Stability selection: screen and refit on B complementary pairs of half-samples; "
            "per feature its selection frequency (0: off).",
            callback=at_least(0),
            rich_help_panel=_TRUST,
        ),
    ] = 0,
    stability_threshold: Annotated[
        float,
        typer.Option(
            "--stability-threshold",
            metavar="PI",
            help="Stable set: features selected in at least this share of the 2B halves "
            "(above 0.5, at most 1).",
            callback=stability_share,
            rich_help_panel=_TRUST,
        ),
    ] = 0.6,
    cv_folds: Annotated[
        int,
        typer.Option(
            "--cv-folds",
            metavar="K",
            help="Held-out accuracy: K-fold cross-validation of screen and refit, screening "
            "inside each fold (0: off).",
            callback=cv_folds_check,
            rich_help_panel=_TRUST,
        ),
    ] = 0,
    workers: WorkersOpt = None,
    scheduler: SchedulerOpt = None,
    restart: RestartOpt = False,
    quiet: QuietOpt = False,
    memory_budget: MemoryOpt = None,
    report: ReportOpt = True,
) -> None:
    """Iterative screening: screen, fit a penalised model, rank the rest given it, refit, repeat.

    Writes model.tsv (the final model), iterations.tsv (one row per iteration), entries.tsv (who entered and left), ranking.tsv (the first screen's shortlist; not after --split) and manifest.json into the run folder; rerunning resumes pass by pass.
    """
    from ..workflow._iterate import IterateConfig
    from ..workflow._problem import expand_response
    from ..workflow._run import run

    config = IterateConfig(
        response=expand_response(response, outcome, covariates_of(covariates), event),
        family=family,
        covariates=covariates_of(covariates),
        event=event,
        shortlist=shortlist,
        penalty=penalty,
        criterion=criterion,
        max_iter=max_iter,
        threshold=threshold,
        alpha=alpha,
        n_permutations=permutations,
        split=split,
        seed=seed,
        drop_missing=drop_missing,
        drop_rare=drop_rare,
        stability=stability,
        stability_threshold=stability_threshold,
        cv_folds=cv_folds,
    )
    from ..engine import staged_run_folder

    # A run folder on object storage is worked on in a local copy, uploaded as the run goes.
    with staged_run_folder(out) as here:
        result = run(
            store,
            outcome,
            config,
            here,
            scheduler=scheduler_of(workers, scheduler),
            progress=lambda name: progress_display(
                name, quiet, unit="refits" if name.endswith("refits") else "blocks"
            ),
            restart=restart,
            memory_budget=budget_of(memory_budget),
        )
        if hasattr(result, "names"):  # several traits
            from ._traits import echo_traits

            echo_traits(result, out, report, here)
            return
        rep = result.problem.samples
        shown = ", ".join(str(f) for f in result.feature_ids[:10])
        more = f" and {result.index.size - 10} more" if result.index.size > 10 else ""
        typer.echo(
            f"{len(result.iterations)} iteration(s) on {rep['n_analysed']} samples, size budget "
            f"{result.budget}; stopped: {result.stop_reason}; selected {result.index.size} "
            f"feature(s){': ' + shown + more if shown else ''}; model in {out / 'model.tsv'}"
        )
        lam = first_lambda_gc(result.iterations)
        if lam is not None:
            typer.echo(lambda_gc_line(lam))
        stab = result.extra.get("stability")
        if stab is not None:
            ss = (
                ""
                if stab.bound_ss is None
                else f", {stab.bound_ss:.3g} if unimodal (Shah-Samworth)"
            )
            typer.echo(
                f"stability selection over {2 * stab.n_pairs} half-samples: {stab.stable.size} "
                f"feature(s) selected in at least {stab.threshold:g} of them; expected false "
                f"selections <= {stab.bound_mb:.3g} (Meinshausen-Buhlmann){ss}; "
                f"in {out / 'stability.tsv'}"
            )
        cv = result.extra.get("cv")
        if cv is not None:
            typer.echo(f"{cv.text()}; per fold in {out / 'cv.tsv'}")
        for warning in result.warnings:
            typer.echo(f"warning: {warning}", err=True)
        if report:
            from ..report import build_report

            typer.echo(f"report: {shown_path(out, here, build_report(here))}")
