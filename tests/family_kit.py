"""The shared family kit: one small problem per registered family, for every entry point's tests.

The fixture `family_case` (in ``conftest.py``, built by `make_case`) is parametrised over the registry
of families: a test that asks for it runs once per family, so a family added to the registry is tried
everywhere at once. A `Case`
carries the same data three ways: arrays (X, y, event, sample ids), a store with an outcome table (rows
of the table in another order than the store's), and what a test needs to call either route.

A test asks for the fixture by name, and imports `Case` and the constants from here for its checks.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from widescreen.families import FAMILIES

from .conftest import write_outcome, write_store

N, P = 60, 150  # p > n, so HOLP's Gram matrix has full rank
TRUE = (10, 40, 90)  # features with an effect
CONSTANT = 7  # a constant feature: every family must score it 0
MISSING = 20  # a feature with missing values (imputed at its mean)


@dataclass(frozen=True)
class Case:
    """One family's small problem.

    Attributes
    ----------
    family : str
    X : ndarray of shape (N, P)
        Float64 with NaN for missing; feature CONSTANT is constant.
    y : ndarray of shape (N,)
        The response (survival: the time); text labels for the logistic family.
    event : ndarray of shape (N,) or None
    sample_ids : ndarray of str of shape (N,)
        The store's sample order.
    store : Path
        The store of X (chunks of 32 features: the last block is narrower).
    outcome : Path
        The outcome table, rows shuffled; columns ``y`` (and ``event``) and covariate ``age``.
    age : ndarray of shape (N,)
    """

    family: str
    X: np.ndarray
    y: np.ndarray
    event: np.ndarray | None
    sample_ids: np.ndarray
    store: Path
    outcome: Path
    age: np.ndarray

    @property
    def config(self) -> dict:
        """Keywords of ScreenConfig / IterateConfig naming this case's columns."""
        return {"response": "y", "family": self.family, "event": self.event_column}

    @property
    def event_column(self) -> str | None:
        return None if self.event is None else "event"


def make_case(root: Path, family: str, seed: int = 5) -> Case:
    """Write the store and outcome table of one family's case under ``root``."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(N, P))
    X[:, CONSTANT] = 1.5
    X[rng.choice(N, 6, replace=False), MISSING] = np.nan
    age = rng.normal(50, 10, size=N)
    eta = 1.2 * X[:, TRUE[0]] - 1.2 * X[:, TRUE[1]] + 1.2 * X[:, TRUE[2]]
    fam = FAMILIES[family]
    event = None
    if fam.loss == "binomial":
        p = 1 / (1 + np.exp(-eta))
        y = np.where(rng.random(N) < p, "case", "control")
    elif fam.loss == "poisson":
        y = rng.poisson(np.exp(0.5 * eta)).astype(float)
    elif fam.takes_event:
        t = rng.exponential(1 / np.exp(eta))
        c = rng.exponential(2.0, size=N)
        y, event = np.minimum(t, c), (t <= c).astype(float)
    else:
        y = eta + 0.5 * rng.normal(size=N)
    ids = np.array([f"s{i:03d}" for i in range(N)])
    store = root / f"{family}.zarr"
    write_store(store, X, chunk_features=32, sample_ids=list(ids))
    cols = {"y": [v if isinstance(v, str) else repr(float(v)) for v in y.tolist()]}
    if event is not None:
        cols["event"] = [str(int(e)) for e in event]
    cols["age"] = [repr(float(a)) for a in age]
    outcome = write_outcome(
        root / f"{family}.tsv", list(ids), cols, order=rng.permutation(N).tolist()
    )
    return Case(family, X, y, event, ids, store, outcome, age)
