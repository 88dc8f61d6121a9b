"""The built-in demo: simulate a study of an invented scenario, screen it, compare with the truth."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import typer

from ._progress import ProgressBar


def run_demo(out: Path, *, samples: int, features: int, seed: int, quiet: bool) -> None:
    from ..report._tables import read_tsv
    from ..simulate import SimulationConfig, simulate
    from ..workflow._screen import ScreenConfig, screen

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    store = out / "reeds.zarr"
    typer.echo(
        f"Saltmarsh reed breeding trial (simulated): {samples} plants x {features} variant sites,\n"
        "salt-tolerance score adjusted for plant age and greenhouse batch; 8 causal sites.\n"
    )
    cfg = SimulationConfig(
        design="dosage", n_samples=samples, n_features=features, n_true=8, seed=seed
    )
    sim = simulate(store, cfg, overwrite=True, progress=ProgressBar("simulate", quiet))
    result = screen(
        store,
        sim.outcome_path,
        ScreenConfig(
            response="y", covariates=("age", "batch"), keep="auto", min_maf=0.01, max_missing=0.05
        ),
        out / "run",
        progress=ProgressBar("screen", quiet),
        restart=True,
    )
    truth = read_tsv(sim.truth_path)
    ranking = read_tsv(out / "run" / "ranking.tsv")
    rank_of = {f: int(r) for f, r in zip(ranking["feature"], ranking["rank"], strict=True)}
    typer.echo(f"\nshortlist: {result.index.size} of {features} sites (floor(n / log n))")
    typer.echo(f"{'causal site':<12} {'effect':>8} {'rank':>6}")
    found = 0
    for f, b in zip(truth["feature"], truth["coefficient"], strict=True):
        r = rank_of.get(f)
        found += r is not None
        typer.echo(f"{f:<12} {float(b):>8.3f} {r if r is not None else '-':>6}")
    typer.echo(f"\n{found} of {len(truth['feature'])} causal sites are on the shortlist.")
    top = ranking["feature"][:5]
    causal = set(truth["feature"])
    marks = ", ".join(f"{f}{'*' if f in causal else ''}" for f in top)
    typer.echo(f"top 5 (causal marked *): {marks}")
    p = np.asarray(ranking["p_value"], dtype=float)[:5]
    typer.echo("their p-values: " + ", ".join(f"{v:.2e}" for v in p))
    typer.echo(f"\nrun folder: {out / 'run'} (ranking.tsv, manifest.json, passes/)")
