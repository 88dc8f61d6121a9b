"""Statistics kernels: pure functions over one in-memory block, no I/O, no Dask.

Each kernel is a pair: ``prepare_*`` builds a response state once per pass (from the outcome, the
covariates and, in the iterative pass, the conditioning set or offset), and ``*_statistics(block, state)``
maps one `widescreen.store.Block` to a dict of per-feature arrays of shape (width,). Every kernel returns
``score`` (larger is stronger; 0 for a constant feature) and, where a test exists, ``p_value``.
"""

from ._linear import LinearState, linear_statistics, prepare_linear

__all__ = ["LinearState", "linear_statistics", "prepare_linear"]
