"""Simulated datasets of the published screening designs, written as stores with outcome and truth tables.

Designs (see the project's CHECKS notes; Fan & Lv 2008 and Fan, Samworth & Wu 2009):

``independent``
    x ~ N(0, I_p); s true features with beta_j = (-1)^U (a + |Z|), U ~ Bernoulli(0.4), Z ~ N(0, 1),
    a = 4 log n / sqrt(n); noise sd ``sigma`` (1.5 in the paper).
``equicorrelated``
    every pair of features has correlation ``rho``: x_j = sqrt(rho) z + sqrt(1 - rho) e_j; coefficients as
    ``independent``.
``hidden``
    pairwise correlation ``rho`` except corr(x4, x_j) = sqrt(rho) (x4 = z); y = 5 x1 + 5 x2 + 5 x3
    - 15 sqrt(rho) x4 + x5 + eps, with x5 independent of everything, so x4 is marginally uncorrelated
    with y yet matters jointly. For a binary outcome the coefficients are (4, 4, 4, -6 sqrt(2)) at
    rho = 0.5, the GLM version of the same construction.
``dosage``
    genotype-like int8 dosages 0/1/2 (allele frequency uniform on [0.05, 0.5]) with a few missing calls;
    s causal features with effects of random sign, two covariates (age, batch) that shift the outcome.

Outcome families (the names of ``--family``): ``linear`` (y = eta + sigma eps), ``logistic`` (a binary
outcome, P(y = 1) = 1 / (1 + exp(-eta))), ``poisson`` (y ~ Poisson(exp(eta))) and ``cox`` (exponential
survival times with rate exp(eta), independent exponential censoring), eta = the truth table's
coefficients times the features (plus the covariate effects of ``dosage``), never clipped. On the ``hidden``
design the Poisson and Cox coefficients are (1, 1, 1, -3 sqrt(rho)).

True features sit at random positions among the p features (seeded), so no method can profit from
their order; the truth table says where they are and which role they play.
"""

from __future__ import annotations

import os
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np

from .store import place
from .store._format import MISSING_INT8, Dataset, DatasetWriter

DESIGNS = ("independent", "equicorrelated", "hidden", "dosage")
FAMILIES = ("linear", "logistic", "poisson", "cox")


@dataclass(frozen=True)
class SimulationConfig:
    """Parameters of a simulated dataset.

    Attributes
    ----------
    design : {"independent", "equicorrelated", "hidden", "dosage"}
    n_samples, n_features : int
    n_true : int
        Number of true features (fixed at 5 for ``hidden``: x1..x5, or 4 for the GLM families).
    rho : float
        Pairwise correlation for ``equicorrelated`` and ``hidden``.
    sigma : float
        Noise standard deviation of a ``linear`` outcome.
    family : {"linear", "logistic", "poisson", "cox"}
        The outcome's model.
    seed : int
    chunk_features : int, optional
        Features per chunk of X (default from the store's rule).
    """

    design: str = "independent"
    n_samples: int = 200
    n_features: int = 1000
    n_true: int = 8
    rho: float = 0.5
    sigma: float = 1.5
    family: str = "linear"
    seed: int = 0
    chunk_features: int | None = None

    def __post_init__(self) -> None:
        if self.design not in DESIGNS:
            raise ValueError(f"design must be one of {DESIGNS}; got {self.design!r}")
        if self.family not in FAMILIES:
            raise ValueError(f"family must be one of {FAMILIES}; got {self.family!r}")
        if self.n_samples < 4 or self.n_features < 1:
            raise ValueError("need at least 4 samples and 1 feature")
        if not 0.0 <= self.rho < 1.0:
            raise ValueError(f"rho must be in [0, 1); got {self.rho}")
        if self.design != "hidden" and not 0 <= self.n_true <= self.n_features:
            raise ValueError(f"n_true must be between 0 and n_features; got {self.n_true}")
        if self.design == "hidden" and self.n_features < 5:
            raise ValueError("the hidden design needs at least 5 features")

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class Simulation:
    """A written simulation: the store, the outcome and truth tables."""

    dataset: Dataset
    outcome_path: Path
    truth_path: Path
    true_index: np.ndarray
    true_coef: np.ndarray
    roles: tuple[str, ...]


def _coefficients(
    cfg: SimulationConfig, rng: np.random.Generator
) -> tuple[np.ndarray, tuple[str, ...]]:
    n, s = cfg.n_samples, cfg.n_true
    if cfg.design == "hidden":
        r = np.sqrt(cfg.rho)
        if cfg.family == "logistic":
            # GLM version: 3 * 4 * sqrt(rho) - 6 sqrt(2) * ... = 0 at rho = 0.5 (Fan, Samworth & Wu 2009).
            return np.array([4.0, 4.0, 4.0, -12.0 * r]), ("joint", "joint", "joint", "hidden")
        if cfg.family in ("poisson", "cox"):
            # The same cancellation on a log scale, a quarter of the logistic size so that exp(eta)
            # stays in a sane range without any clipping (sd of eta about 1.2 at rho = 0.5).
            return np.array([1.0, 1.0, 1.0, -3.0 * r]), ("joint", "joint", "joint", "hidden")
        return np.array([5.0, 5.0, 5.0, -15.0 * r, 1.0]), (
            "joint",
            "joint",
            "joint",
            "hidden",
            "weak",
        )
    if cfg.design == "dosage":
        sign = rng.choice([-1.0, 1.0], size=s)
        return sign * rng.uniform(0.25, 0.6, size=s), ("causal",) * s
    a = 4.0 * np.log(n) / np.sqrt(n)
    u = rng.random(s) < 0.4
    beta = np.where(u, -1.0, 1.0) * (a + np.abs(rng.standard_normal(s)))
    if cfg.family != "linear":
        # Keep GLM linear predictors in a sane range: |beta| <= 2 on the logit scale, <= 1 on log scales.
        top = 2.0 if cfg.family == "logistic" else 1.0
        beta = top * beta / max(np.abs(beta).max(), 1e-12)
    return beta, ("true",) * s


def _block(
    cfg: SimulationConfig,
    rng: np.random.Generator,
    z: np.ndarray,
    start: int,
    stop: int,
    hidden_pos: int | None,
    weak_pos: int | None,
) -> np.ndarray:
    n, w = cfg.n_samples, stop - start
    if cfg.design == "dosage":
        af = rng.uniform(0.05, 0.5, size=w)
        x = rng.binomial(2, af, size=(n, w)).astype(np.int8)
        x[rng.random((n, w)) < 0.01] = MISSING_INT8
        return x
    e = rng.standard_normal((n, w))
    if cfg.design == "independent":
        return e.astype(np.float32)
    x = np.sqrt(cfg.rho) * z[:, None] + np.sqrt(1.0 - cfg.rho) * e
    if hidden_pos is not None and start <= hidden_pos < stop:
        x[:, hidden_pos - start] = z
    if weak_pos is not None and start <= weak_pos < stop:
        x[:, weak_pos - start] = e[:, weak_pos - start]
    return x.astype(np.float32)


def simulate(
    path: str | os.PathLike,
    config: SimulationConfig,
    *,
    outcome_path: str | os.PathLike | None = None,
    truth_path: str | os.PathLike | None = None,
    overwrite: bool = False,
    progress=None,
) -> Simulation:
    """Write a simulated store plus its outcome table and truth table.

    Parameters
    ----------
    path : str or path-like
        The new store: a folder, or a URL on object storage (``s3://bucket/sim.zarr``, written like
        ``import`` writes one).
    config : SimulationConfig
    outcome_path, truth_path : optional
        Default to ``<store>.outcome.tsv`` and ``<store>.truth.tsv`` beside a store folder; beside a
        store on a URL they would be objects, which ``--outcome`` does not read, so they default to
        the current folder (``./<store name>.outcome.tsv``).
    progress : callable(done, total), optional

    Returns
    -------
    Simulation
    """
    cfg = config
    path = place(path)
    # The tables are local files: beside a store folder, in the current folder for a URL.
    beside = path.parent if isinstance(path, Path) else Path.cwd()
    outcome_path = Path(outcome_path or beside / (path.name + ".outcome.tsv"))
    truth_path = Path(truth_path or beside / (path.name + ".truth.tsv"))
    root = np.random.SeedSequence(cfg.seed)
    coef_seed, pos_seed, z_seed, noise_seed, blocks_seed = root.spawn(5)
    beta, roles = _coefficients(cfg, np.random.default_rng(coef_seed))
    p = cfg.n_features
    true_index = np.sort(np.random.default_rng(pos_seed).choice(p, size=beta.size, replace=False))
    # Roles follow the design's order (x1, x2, ...), placed at sorted random positions.
    order = (
        np.random.default_rng(pos_seed).permutation(beta.size)
        if cfg.design != "hidden"
        else np.arange(beta.size)
    )
    beta, roles = beta[order], tuple(roles[i] for i in order)
    hidden_pos = int(true_index[3]) if cfg.design == "hidden" else None
    weak_pos = int(true_index[4]) if cfg.design == "hidden" and beta.size > 4 else None

    n = cfg.n_samples
    z = np.random.default_rng(z_seed).standard_normal(n)
    sample_ids = [f"S{i + 1:05d}" for i in range(n)]
    value_kind, dtype = ("dosage", "int8") if cfg.design == "dosage" else ("continuous", "float32")
    chunks = None
    if cfg.chunk_features:
        chunks = (n, int(cfg.chunk_features))
    eta = np.zeros(n)
    with DatasetWriter(
        path,
        sample_ids,
        value_kind,
        dtype,
        n_features=p,
        chunks=chunks,
        source=f"simulate {cfg.design}",
        overwrite=overwrite,
    ) as writer:
        width = writer.chunks[1]
        n_blocks = -(-p // width)
        # One child seed per block: the data depend on the seed and the chunk width only.
        for b, seed in enumerate(blocks_seed.spawn(n_blocks)):
            start, stop = b * width, min((b + 1) * width, p)
            x = _block(cfg, np.random.default_rng(seed), z, start, stop, hidden_pos, weak_pos)
            here = (true_index >= start) & (true_index < stop)
            if here.any():
                cols = x[:, true_index[here] - start].astype(np.float64)
                if x.dtype == np.int8:
                    cols[cols == MISSING_INT8] = 0.0  # a missing call contributes nothing
                eta += cols @ beta[here]
            writer.append(x, [f"F{j + 1:07d}" for j in range(start, stop)])
            if progress is not None:
                progress(b + 1, n_blocks)
        ds = writer.finalize()

    rng = np.random.default_rng(noise_seed)
    covariates = {}
    if cfg.design == "dosage":
        covariates["age"] = np.round(rng.uniform(20, 70, size=n), 1)
        covariates["batch"] = rng.integers(0, 3, size=n).astype(float)
        eta = eta + 0.03 * (covariates["age"] - 45) + 0.4 * covariates["batch"]
    columns = _outcome(cfg, eta, rng)
    _write_outcome(outcome_path, sample_ids, {**columns, **covariates}, rng)
    _write_truth(truth_path, ds.feature_ids_at(true_index), true_index, beta, roles)
    return Simulation(ds, outcome_path, truth_path, true_index, beta, roles)


def _outcome(
    cfg: SimulationConfig, eta: np.ndarray, rng: np.random.Generator
) -> dict[str, np.ndarray]:
    n = eta.size
    if cfg.family == "linear":
        sigma = 1.0 if cfg.design == "hidden" else cfg.sigma
        return {"y": eta + sigma * rng.standard_normal(n)}
    if cfg.family == "logistic":
        return {"y": (rng.random(n) < 1.0 / (1.0 + np.exp(-eta))).astype(float)}
    # Counts and times follow the stated model exactly (no clipping of eta): the coefficients are sized
    # so that exp(eta) stays in range, and a design that leaves it is refused rather than distorted.
    if cfg.family in ("poisson", "cox") and np.abs(eta).max() > 30.0:
        raise ValueError(
            f"the linear predictor reaches {np.abs(eta).max():.1f} on the log scale; the {cfg.family} "
            "outcome would overflow: lower n_true"
        )
    if cfg.family == "poisson":
        return {"y": rng.poisson(np.exp(eta)).astype(float)}
    t = rng.exponential(1.0 / np.exp(eta))
    c = rng.exponential(np.median(t) * 2.0, size=n)
    return {"time": np.minimum(t, c), "event": (t <= c).astype(float)}


def _write_outcome(path: Path, ids: list[str], cols: dict[str, np.ndarray], rng) -> None:
    from .engine._runfolder import atomic_write

    names = list(cols)
    # Rows in a shuffled order: the outcome table is joined by sample id, not by position.
    order = rng.permutation(len(ids))
    lines = ["\t".join(["sample", *names])]
    for i in order:
        vals = [_fmt(cols[c][i]) for c in names]
        lines.append("\t".join([ids[i], *vals]))
    atomic_write(path, "\n".join(lines) + "\n")


def _fmt(v: float) -> str:
    return str(int(v)) if float(v).is_integer() and abs(v) < 1e15 else repr(float(v))


def _write_truth(path: Path, ids, index, beta, roles) -> None:
    from .engine._runfolder import atomic_write

    lines = ["feature\tindex\tcoefficient\trole"]
    for f, i, b, r in zip(ids, index, beta, roles, strict=True):
        lines.append(f"{f}\t{int(i)}\t{float(b)!r}\t{r}")
    atomic_write(path, "\n".join(lines) + "\n")
