"""Shared fixtures: small simulated stores and outcome tables."""

from __future__ import annotations

import numpy as np
import pytest

from widescreen.families import FAMILY_NAMES
from widescreen.store import DatasetWriter

from .s3_kit import s3_server  # noqa: F401  (one S3 server per session, for the tests that ask)


def write_store(path, X, *, chunk_features=None, sample_ids=None, feature_ids=None):
    """Write an array to a store (int8 -> dosage, float -> continuous)."""
    X = np.asarray(X)
    n, p = X.shape
    kind, dtype = ("dosage", "int8") if X.dtype == np.int8 else ("continuous", X.dtype.name)
    sample_ids = sample_ids if sample_ids is not None else [f"s{i}" for i in range(n)]
    feature_ids = feature_ids if feature_ids is not None else [f"f{j}" for j in range(p)]
    chunks = (n, chunk_features) if chunk_features else None
    w = DatasetWriter(path, sample_ids, kind, dtype, n_features=p, chunks=chunks)
    w.append(X, feature_ids)
    return w.finalize()


def write_outcome(path, ids, columns: dict, order=None):
    names = list(columns)
    idx = range(len(ids)) if order is None else order
    lines = ["\t".join(["sample", *names])]
    for i in idx:
        lines.append("\t".join([ids[i], *[str(columns[c][i]) for c in names]]))
    path.write_text("\n".join(lines) + "\n")
    return path


@pytest.fixture
def rng():
    return np.random.default_rng(12345)


@pytest.fixture(scope="module", params=sorted(FAMILY_NAMES))
def family_case(request, tmp_path_factory):
    """Every registered family's small problem (see `family_kit`); shared by the tests of a module."""
    from .family_kit import make_case

    return make_case(tmp_path_factory.mktemp(f"kit-{request.param}"), request.param)
