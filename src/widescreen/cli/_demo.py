"""``widescreen simulate`` and ``widescreen demo``: simulated stores, and the whole job on one of them.

The demo simulates an invented scenario, runs screen + refit + conditional passes on it and compares
the model with the truth, saying for every causal site that was missed why it was missed.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from ._app import NOT_RESUMABLE, command, first_lambda_gc, lambda_gc_line
from ._options import QuietOpt, at_least, below_one, one_of, positive
from ._progress import progress_display

#: Filters the demo applies (a common practice for genotype data: drop rare and poorly called sites).
DEMO_DROP_RARE = 0.01
DEMO_DROP_MISSING = 0.05


@command("simulate", interrupted=NOT_RESUMABLE)
def simulate_cmd(
    store: Annotated[
        str,
        typer.Argument(
            metavar="STORE",
            help="The new store: a folder or a URL (s3://, gs://, az://); for a URL the outcome and "
            "truth tables go to the current folder.",
        ),
    ],
    design: Annotated[
        str,
        typer.Option(
            "--design",
            metavar="NAME",
            help="independent, equicorrelated, hidden or dosage.",
            callback=one_of("independent", "equicorrelated", "hidden", "dosage"),
        ),
    ] = "independent",
    family: Annotated[
        str,
        typer.Option(
            "--family",
            metavar="NAME",
            help="Model of the outcome: linear (continuous y), logistic (binary y), poisson "
            "(counts y) or cox (survival: time and event).",
            callback=one_of("linear", "logistic", "poisson", "cox"),
        ),
    ] = "linear",
    samples: Annotated[
        int,
        typer.Option(
            "--samples", "-n", metavar="N", help="Number of samples.", callback=at_least(4)
        ),
    ] = 200,
    features: Annotated[
        int,
        typer.Option(
            "--features", "-p", metavar="P", help="Number of features.", callback=at_least(1)
        ),
    ] = 1000,
    true: Annotated[
        int,
        typer.Option(
            "--true",
            metavar="S",
            help="Number of true features (the hidden design fixes its own).",
            callback=at_least(0),
        ),
    ] = 8,
    rho: Annotated[
        float,
        typer.Option(
            "--rho",
            metavar="RHO",
            help="Pairwise correlation, in [0, 1) (equicorrelated, hidden).",
            callback=below_one,
        ),
    ] = 0.5,
    sigma: Annotated[
        float,
        typer.Option(
            "--sigma", metavar="SD", help="Noise sd of a linear outcome.", callback=positive
        ),
    ] = 1.5,
    seed: Annotated[
        int, typer.Option("--seed", metavar="N", help="Random seed.", callback=at_least(0))
    ] = 0,
    chunk_features: Annotated[
        int | None,
        typer.Option(
            "--chunk-features",
            metavar="N",
            help="Features per chunk of X.",
            callback=at_least(1),
            show_default="about 16 MiB chunks",
        ),
    ] = None,
    overwrite: Annotated[
        bool, typer.Option("--overwrite", help="Replace an existing store.")
    ] = False,
    quiet: QuietOpt = False,
) -> None:
    """Write a simulated store plus STORE.outcome.tsv and STORE.truth.tsv (a published design)."""
    from ..simulate import SimulationConfig, simulate

    cfg = SimulationConfig(
        design=design,
        n_samples=samples,
        n_features=features,
        n_true=true,
        rho=rho,
        sigma=sigma,
        family=family,
        seed=seed,
        chunk_features=chunk_features,
    )
    sim = simulate(store, cfg, overwrite=overwrite, progress=progress_display("simulate", quiet))
    typer.echo(f"wrote {store} ({samples} x {features}), {sim.outcome_path}, {sim.truth_path}")


@command("demo")
def demo_cmd(
    out: Annotated[
        Path,
        typer.Option(
            "--out",
            metavar="FOLDER",
            help="Folder the demo writes its store, outcome table and run folder into.",
        ),
    ] = Path("widescreen-demo"),
    samples: Annotated[
        int,
        typer.Option(
            "--samples", "-n", metavar="N", help="Number of plants.", callback=at_least(4)
        ),
    ] = 600,
    features: Annotated[
        int,
        typer.Option(
            "--features",
            "-p",
            metavar="P",
            help="Number of variant sites.",
            callback=at_least(8),
        ),
    ] = 50_000,
    seed: Annotated[
        int, typer.Option("--seed", metavar="N", help="Random seed.", callback=at_least(0))
    ] = 7,
    quiet: QuietOpt = False,
) -> None:
    """Simulate a study, run the whole job on it and compare the model with the truth.

    The scenario: a breeding programme of the fictional 'Saltmarsh reed', 600 plants genotyped at 50,000 variant sites (dosages 0/1/2), a quantitative salt-tolerance score, age and batch covariates, and 8 causal variants hidden among the rest.
    """
    run_demo(out, samples=samples, features=features, seed=seed, quiet=quiet)


def run_demo(out: Path, *, samples: int, features: int, seed: int, quiet: bool) -> None:
    """Simulate the scenario into ``out``, run the whole job and print the comparison with the truth."""
    import numpy as np

    from ..report import build_report
    from ..schema import read_tsv
    from ..simulate import SimulationConfig, simulate
    from ..workflow._iterate import IterateConfig
    from ..workflow._run import run

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    store = out / "reeds.zarr"
    typer.echo(
        f"Saltmarsh reed breeding trial (simulated): {samples} plants x {features} variant sites\n"
        "(dosages 0/1/2), a salt-tolerance score adjusted for plant age and greenhouse batch;\n"
        "8 causal sites hidden among the rest. Screen, refit (SCAD, extended BIC), iterate.\n"
        f"Writing into {out.resolve()} (choose another folder with --out).\n"
    )
    cfg = SimulationConfig(
        design="dosage", n_samples=samples, n_features=features, n_true=8, sigma=1.0, seed=seed
    )
    sim = simulate(store, cfg, overwrite=True, progress=progress_display("simulate", quiet))
    config = IterateConfig(
        response="y",
        covariates=("age", "batch"),
        shortlist="auto",
        drop_rare=DEMO_DROP_RARE,
        drop_missing=DEMO_DROP_MISSING,
    )
    result = run(
        store,
        sim.outcome_path,
        config,
        out / "run",
        progress=lambda name: progress_display(name, quiet),
        restart=True,
    )
    report = build_report(out / "run")

    truth = read_tsv(sim.truth_path)
    causal_idx = truth["index"].astype(np.int64)
    d = result.budget
    why = explain_causal(result, causal_idx, d)
    coef_of = dict(zip(result.feature_ids.tolist(), result.coef.tolist(), strict=True))
    # The unpenalised refit on the selected set: the penalised estimates are shrunk towards zero.
    refit = result.refit if result.refit is not None and result.refit.exists else None
    refit_of = (
        dict(zip(result.feature_ids.tolist(), np.asarray(refit.coef).tolist(), strict=True))
        if refit is not None
        else {}
    )
    typer.echo(
        f"\nshortlist: {d} of {features} sites (floor(n / log n)); "
        f"{len(result.iterations)} iteration(s), stopped: {result.stop_reason}"
    )
    lam = first_lambda_gc(result.iterations)
    if lam is not None:
        typer.echo(lambda_gc_line(lam))
    typer.echo(
        f"{'causal site':<12} {'true effect':>11} {'penalised':>9} {'refit':>8}  how it went"
    )
    for f, b, note in zip(truth["feature"], truth["coefficient"], why, strict=True):
        c, r = coef_of.get(f), refit_of.get(f)
        shown = (
            f"{f'{c:.3f}' if c is not None else '-':>9} {f'{r:.3f}' if r is not None else '-':>8}"
        )
        typer.echo(f"{f:<12} {float(b):>11.3f} {shown}  {note}")
    causal = set(truth["feature"])
    in_model = len(causal & set(coef_of))
    false_pos = sorted(set(coef_of) - causal)
    typer.echo(
        f"\nthe model holds {len(coef_of)} sites: {in_model} of {len(causal)} causal, "
        f"{len(false_pos)} not causal{(' (' + ', '.join(false_pos) + ')') if false_pos else ''}."
    )
    if coef_of:
        err = np.sqrt(
            sum(
                (coef_of.get(f, 0.0) - float(b)) ** 2
                for f, b in zip(truth["feature"], truth["coefficient"], strict=True)
            )
            + sum(coef_of[f] ** 2 for f in false_pos)
        )
        typer.echo(f"estimation error ||beta_hat - beta||_2 = {err:.3f} (penalised estimates)")
    typer.echo(
        f"\nwritten to {out.resolve()}:\n"
        f"  store {store} (with {sim.outcome_path.name} and {sim.truth_path.name})\n"
        f"  run folder {out / 'run'} (model.tsv, iterations.tsv, ranking.tsv, manifest.json)\n"
        f"  report {report}\n"
        "A screened association is a lead for replication, not a finding; p-values after selection\n"
        "are not plain p-values."
    )


def explain_causal(result, index, shortlist: int) -> list[str]:
    """One line per feature in ``index`` saying how the run treated it.

    Parameters
    ----------
    result : IterativeResult
        A finished run with a run folder.
    index : ndarray of int of shape (s,)
        Store indices of the features to explain (the causal ones).
    shortlist : int
        Size of the first screen's shortlist.

    Returns
    -------
    list of str
        For example ``"marginal rank 202, outside the 93-site shortlist; not found by the
        conditional passes"`` or ``"selected (marginal rank 3, entered at the screen)"``.
    """
    import numpy as np

    from ..engine import read_stats

    first = result.screen[0].name
    st = read_stats(result.run, first, ("score", "filtered", "missing_rate", "mean"))
    score = np.where(st["filtered"], -np.inf, st["score"])
    # Rank = 1 + the number of features scoring strictly higher (ties share the better rank).
    order = np.sort(score)
    rank = order.size - np.searchsorted(order, score[index], side="right") + 1
    entered = dict(zip(result.index.tolist(), result.entered.tolist(), strict=True))
    notes = []
    for j, r in zip(index.tolist(), rank.tolist(), strict=True):
        if st["filtered"][j]:
            af = st["mean"][j] / 2.0
            maf, miss = min(af, 1.0 - af), st["missing_rate"][j]
            reasons = [f"minor allele frequency {maf:.3f} < {DEMO_DROP_RARE}"] * (
                maf < DEMO_DROP_RARE
            ) + [f"missing rate {miss:.3f} > {DEMO_DROP_MISSING}"] * (miss > DEMO_DROP_MISSING)
            notes.append("dropped before screening: " + ("; ".join(reasons) or "by the filters"))
            continue
        where = (
            f"marginal rank {r}, in the {shortlist}-site shortlist"
            if r <= shortlist
            else f"marginal rank {r}, outside the {shortlist}-site shortlist"
        )
        if j in entered:
            it = entered[j]
            how = "entered at the screen" if it == 0 else f"entered at iteration {it}"
            notes.append(f"selected ({where}; {how})")
        elif r <= shortlist:
            notes.append(f"not selected: {where}, but the penalised fit left it out")
        elif len(result.iterations) > 1:
            notes.append(f"not selected: {where}, and no conditional pass brought it in")
        else:
            notes.append(
                f"not selected: {where}; the run made no conditional pass "
                f"(stopped: {result.stop_reason})"
            )
    return notes
