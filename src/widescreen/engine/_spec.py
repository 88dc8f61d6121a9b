"""What a pass is asked to do (`PassSpec`, `FeatureFilter`) and what it reports (`PassResult`)."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from dask.base import tokenize

from .._config import check_number
from ._source import BlockSource
from ._topk import TopK

#: Statistics every pass records beside the kernel's own columns.
ENGINE_COLUMNS = ("missing_rate", "mean", "filtered")


@dataclass(frozen=True)
class FeatureFilter:
    """Features excluded in the pass (they get score 0, ``filtered`` = True and stay off the shortlist).

    Attributes
    ----------
    drop_missing : float, optional
        Drop features whose missing rate exceeds this (0 to 1).
    drop_rare : float, optional
        Dosage stores only: drop features whose minor allele frequency is below this (0 to 0.5).
    """

    drop_missing: float | None = None
    drop_rare: float | None = None

    def __post_init__(self) -> None:
        check_number("drop_missing", self.drop_missing, 0.0, 1.0, optional=True)
        check_number("drop_rare", self.drop_rare, 0.0, 0.5, optional=True)

    def check(self, value_kind: str) -> None:
        """Refuse a filter the data cannot take: the allele-frequency filter needs dosages."""
        if self.drop_rare is not None and value_kind != "dosage":
            raise ValueError(
                f"the data hold {value_kind} values; the minor allele frequency filter "
                "(--drop-rare, drop_rare) applies to dosage stores only"
            )

    def to_dict(self) -> dict:
        return {"drop_missing": self.drop_missing, "drop_rare": self.drop_rare}


@dataclass(frozen=True)
class PassSpec:
    """Everything a pass needs besides the data.

    Attributes
    ----------
    name : str
        Name of the pass inside the run folder (for example ``"screen"`` or ``"iter2"``).
    kernel : callable (Block, state) -> dict of arrays
        A pure statistics kernel (module-level function, so it pickles to worker processes).
    state : object
        The kernel's response state.
    columns : tuple of str
        Kernel outputs recorded for every feature.
    keep : int
        Length of the top-k list kept (with the columns' values when ``keep_values``).
    rows : ndarray of int, optional
        Store rows of the analysed samples, in the order of the response; all rows when None.
    exclude : ndarray of int
        Store indices of features kept off the top-k list (the already selected ones).
    filters : FeatureFilter
    keep_values : bool
    sub_block : int
        Largest width of the sub-blocks a chunk is processed in; bounds the float64 working memory per
        thread. A memory budget may lower it (`widescreen.engine.plan_memory`).
    temporaries : float
        Float64 (n, sub_block) temporaries the kernel makes at its peak, for the memory plan.
    floor_key : str
        Names the running floor the pass's blocks share in a process (`widescreen.engine._topk`);
        set by `build_pass`, not part of the pass's inputs.
    """

    name: str
    kernel: Callable[[Any, Any], dict]
    state: Any
    columns: tuple[str, ...]
    keep: int
    rows: np.ndarray | None = None
    exclude: np.ndarray = field(default_factory=lambda: np.empty(0, np.int64))
    filters: FeatureFilter = FeatureFilter()
    keep_values: bool = True
    sub_block: int = 1024
    temporaries: float = 2.0
    floor_key: str = ""

    def token(self, source: BlockSource) -> str:
        """Deterministic name of the pass's inputs: the checkpoints of another token are not reused.

        The sub-block width is left out on purpose: it is an operational setting (memory), recorded
        with the pass instead, so a resumed pass with a smaller budget keeps its finished blocks.
        """
        return tokenize(
            self.name,
            self.kernel.__module__,
            self.kernel.__qualname__,
            self.state,
            self.columns,
            self.keep,
            self.rows,
            self.exclude,
            self.filters.to_dict(),
            source.token(),
        )

    @property
    def all_columns(self) -> tuple[str, ...]:
        return (*self.columns, *ENGINE_COLUMNS)

    @property
    def n_nulls(self) -> int:
        return int(getattr(self.state, "n_nulls", 0))

    @property
    def n_responses(self) -> int:
        """K for a pass over a response matrix (statistics of shape (width, K)); 0 otherwise."""
        return int(getattr(self.state, "n_responses", 0))

    @property
    def wide_columns(self) -> tuple[str, ...]:
        """The statistics with one value per response (all of them, in a response-matrix pass)."""
        return self.all_columns if self.n_responses else ()

    @property
    def lhs_rows(self) -> int:
        """Rows of the kernel's left factor (products per feature), for the memory plan."""
        lhs = getattr(self.state, "lhs_t", None)
        return int(lhs.shape[0]) if lhs is not None else self.n_nulls + 1

    @property
    def n_analysed(self) -> int | None:
        return None if self.rows is None else len(self.rows)


@dataclass
class PassResult:
    """Outcome of a pass.

    Attributes
    ----------
    topk : TopK
        Strongest features (values filled in, also for blocks reused from a checkpoint).
    stats : dict of ndarray of shape (n_features,), or None
        All features' statistics when the pass ran without a run folder.
    n_filtered, n_constant : int
        Features excluded by the filters, and constant ones.
    n_degenerate, n_nonfinite : int
        Features left out of the ranking because the kernel could not score them (explained by
        the adjustment set, or a failed fit), and features whose score was not a finite number.
        Every feature is either ranked or counted in one of these four.
    blocks_reused, blocks_computed : int
        Blocks taken from completion markers, and blocks run in this call.
    seconds : float
        Wall time of the call.
    sub_block : int
        Sub-block width the blocks of this call were computed with.
    scheduler : str
        Where the blocks ran.
    plan : dict, optional
        The memory plan (`MemoryPlan.to_dict`) when a memory budget applied.
    seconds_blocks : float
        Time spent in the block tasks of this call, summed over tasks.
    seconds_fetch : float
        Time spent reading the kept values of features from reused blocks.
    notes : tuple of str
        Anything a reader of the results should know (for example mixed sub-block widths).
    response : int, optional
        In a pass over K responses: which response this result is about (`for_response`). The
        merged result of such a pass has ``topk`` a `MultiTopK`, statistics of shape
        (n_features, K) and ``n_filtered``, ``n_constant``, ``n_degenerate``, ``n_nonfinite`` of shape (K,).
    """

    name: str
    topk: TopK
    stats: dict[str, np.ndarray] | None
    n_features: int
    n_filtered: int
    n_constant: int
    blocks_reused: int
    blocks_computed: int
    seconds: float
    sub_block: int = 0
    scheduler: str = ""
    plan: dict | None = None
    seconds_blocks: float = 0.0
    seconds_fetch: float = 0.0
    notes: tuple[str, ...] = ()
    n_degenerate: int = 0
    n_nonfinite: int = 0
    response: int | None = None

    @property
    def n_responses(self) -> int:
        """K for the merged result of a pass over K responses; 0 otherwise."""
        return int(getattr(self.topk, "n_responses", 0)) if self.response is None else 0

    def for_response(self, k: int) -> PassResult:
        """The result of response ``k`` of a pass over K responses, shaped as a one-response result
        (its top list, its statistics of shape (n_features,), its counts); statistics in a run folder
        are read with ``response=k`` (`widescreen.schema.read_stats`)."""
        if not self.n_responses:
            raise ValueError(f"pass {self.name!r} scored one response, not a response matrix")
        if not 0 <= k < self.n_responses:
            raise IndexError(f"response {k} is outside 0..{self.n_responses - 1}")
        stats = None
        if self.stats is not None:
            stats = {c: v[:, k] if v.ndim == 2 else v for c, v in self.stats.items()}
        return replace(
            self,
            topk=self.topk.row(k),
            stats=stats,
            n_filtered=int(np.asarray(self.n_filtered).reshape(-1)[k]),
            n_constant=int(np.asarray(self.n_constant).reshape(-1)[k]),
            n_degenerate=int(np.asarray(self.n_degenerate).reshape(-1)[k]),
            n_nonfinite=int(np.asarray(self.n_nonfinite).reshape(-1)[k]),
            response=k,
        )

    @property
    def left_out(self) -> dict[str, int]:
        """Features left out of the ranking, by reason."""
        return {
            "filtered": self.n_filtered,
            "constant": self.n_constant,
            "degenerate": self.n_degenerate,
            "not finite": self.n_nonfinite,
        }

    def summary(self) -> dict:
        out = {
            "n_features": self.n_features,
            "n_filtered": self.n_filtered,
            "n_constant": self.n_constant,
            "n_degenerate": self.n_degenerate,
            "n_nonfinite": self.n_nonfinite,
            "left_out": self.left_out,
            "blocks_reused": self.blocks_reused,
            "blocks_computed": self.blocks_computed,
            "seconds": round(self.seconds, 3),
            "seconds_blocks": round(self.seconds_blocks, 3),
            "seconds_fetch": round(self.seconds_fetch, 3),
            "sub_block": self.sub_block,
            "scheduler": self.scheduler,
        }
        if self.n_responses:
            out["n_filtered"] = [int(v) for v in np.asarray(self.n_filtered).reshape(-1)]
            out["n_constant"] = [int(v) for v in np.asarray(self.n_constant).reshape(-1)]
            out["n_degenerate"] = [int(v) for v in np.asarray(self.n_degenerate).reshape(-1)]
            out["n_nonfinite"] = [int(v) for v in np.asarray(self.n_nonfinite).reshape(-1)]
            out["n_responses"] = self.n_responses
            out.pop("left_out")
        if self.response is not None:
            out["response"] = self.response
        if self.plan is not None:
            out["memory_plan"] = dict(self.plan)
        if self.notes:
            out["notes"] = list(self.notes)
        return out
