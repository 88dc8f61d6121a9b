"""Typed records of what a run folder's JSON files hold, each with ``to_dict`` / ``from_dict``.

The JSON stays plain (floats round-trip exactly, so a resumed run reuses a record bit for bit); these
classes are the one place that knows its keys. A key a record does not know is kept in ``extra`` and
written back, so a newer writer's additions survive an older reader (the extension point for new
fields: add them here, or let them ride in ``extra`` until they are).
"""

from __future__ import annotations

from dataclasses import dataclass, field, fields
from typing import Any, ClassVar

import numpy as np


def _split(cls, d: dict) -> tuple[dict, dict]:
    """Known keys of a record class (by field name or its ``_keys`` alias) and the rest."""
    alias = getattr(cls, "_keys", {})
    names = {f.name for f in fields(cls)} - {"extra"}
    known, extra = {}, {}
    for k, v in d.items():
        name = alias.get(k, k)
        if name in names:
            known[name] = v
        else:
            extra[k] = v
    return known, extra


def _floats(v) -> tuple[float, ...]:
    return tuple(float("nan") if x is None else float(x) for x in v)


def _finite_or_none(v: float) -> float | None:
    return float(v) if np.isfinite(v) else None  # JSON has no inf or NaN


# --------------------------------------------------------------------------------------------
# A pass


@dataclass(frozen=True)
class PassMeta:
    """``passes/NAME/pass.json``: what the pass folder was made for.

    Attributes
    ----------
    token : str
        Deterministic name of the pass's inputs; checkpoints of another token are not reused.
    columns : tuple of str
        The statistics recorded (the family's, then ``missing_rate``, ``mean``, ``filtered``).
    n_features, block_width, n_blocks : int
    sub_block : int or None
        Sub-block width of the first session that computed blocks (None before any).
    sub_blocks_used : tuple of int
        All widths blocks were computed with, when a later session changed it.
    """

    token: str
    columns: tuple[str, ...]
    n_features: int
    block_width: int
    n_blocks: int
    sub_block: int | None = None
    sub_blocks_used: tuple[int, ...] = ()
    extra: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        d = {
            **self.extra,
            "token": self.token,
            "columns": list(self.columns),
            "n_features": self.n_features,
            "block_width": self.block_width,
            "n_blocks": self.n_blocks,
            "sub_block": self.sub_block,
        }
        if self.sub_blocks_used:
            d["sub_blocks_used"] = list(self.sub_blocks_used)
        return d

    @classmethod
    def from_dict(cls, d: dict) -> PassMeta:
        k, extra = _split(cls, d)
        return cls(
            token=str(k["token"]),
            columns=tuple(k["columns"]),
            n_features=int(k["n_features"]),
            block_width=int(k["block_width"]),
            n_blocks=int(k["n_blocks"]),
            sub_block=None if k.get("sub_block") is None else int(k["sub_block"]),
            sub_blocks_used=tuple(int(v) for v in k.get("sub_blocks_used", ())),
            extra=extra,
        )


@dataclass(frozen=True)
class PassSummary:
    """One session's run of a pass, as the manifest keeps it under ``passes.NAME`` (and its ``runs``).

    Attributes
    ----------
    n_features, n_filtered, n_constant : int
    blocks_reused, blocks_computed : int
    seconds : float
        Wall time of the pass in that session.
    seconds_blocks, seconds_fetch : float
    sub_block : int
    scheduler : str
    session : int or None
        Number of the session (0 for the first) that ran it.
    memory_plan : dict, optional
    notes : tuple of str
    runs : tuple of PassSummary
        Every session's run of the pass (the latest is the record itself).
    """

    n_features: int = 0
    n_filtered: int = 0
    n_constant: int = 0
    blocks_reused: int = 0
    blocks_computed: int = 0
    seconds: float = 0.0
    seconds_blocks: float = 0.0
    seconds_fetch: float = 0.0
    sub_block: int = 0
    scheduler: str = ""
    session: int | None = None
    memory_plan: dict | None = None
    notes: tuple[str, ...] = ()
    runs: tuple[PassSummary, ...] = ()
    extra: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        d: dict[str, Any] = {
            **self.extra,
            "n_features": self.n_features,
            "n_filtered": self.n_filtered,
            "n_constant": self.n_constant,
            "blocks_reused": self.blocks_reused,
            "blocks_computed": self.blocks_computed,
            "seconds": self.seconds,
            "seconds_blocks": self.seconds_blocks,
            "seconds_fetch": self.seconds_fetch,
            "sub_block": self.sub_block,
            "scheduler": self.scheduler,
        }
        if self.session is not None:
            d["session"] = self.session
        if self.memory_plan is not None:
            d["memory_plan"] = dict(self.memory_plan)
        if self.notes:
            d["notes"] = list(self.notes)
        if self.runs:
            d["runs"] = [r.to_dict() for r in self.runs]
        return d

    @classmethod
    def from_dict(cls, d: dict) -> PassSummary:
        k, extra = _split(cls, d)
        ints = ("n_features", "n_filtered", "n_constant", "blocks_reused", "blocks_computed")
        return cls(
            **{n: int(k.get(n, 0)) for n in ints},
            seconds=float(k.get("seconds", 0.0)),
            seconds_blocks=float(k.get("seconds_blocks", 0.0)),
            seconds_fetch=float(k.get("seconds_fetch", 0.0)),
            sub_block=int(k.get("sub_block") or 0),
            scheduler=str(k.get("scheduler", "")),
            session=None if k.get("session") is None else int(k["session"]),
            memory_plan=k.get("memory_plan"),
            notes=tuple(k.get("notes", ())),
            runs=tuple(cls.from_dict(r) for r in k.get("runs", ())),
            extra=extra,
        )

    @property
    def total_seconds(self) -> float:
        """Wall time over every session that worked on the pass."""
        return float(sum(r.seconds for r in self.runs)) if self.runs else self.seconds


# --------------------------------------------------------------------------------------------
# A fit and an iteration


@dataclass(frozen=True)
class PathRecord:
    """The tuning path of one fit: lambdas, the coefficients along them, the criterion.

    Attributes
    ----------
    lambdas : tuple of float, length L
    coefs : ndarray of shape (L, u)
        Coefficients of the union's features along the path.
    features : tuple of str, length u
    criterion : str
    criterion_values : tuple of float, length L (NaN where not finite)
    lambda_ : float
        The chosen level.
    """

    lambdas: tuple[float, ...]
    coefs: np.ndarray
    features: tuple[str, ...]
    criterion: str
    criterion_values: tuple[float, ...]
    lambda_: float | None
    extra: dict = field(default_factory=dict)

    _keys: ClassVar[dict[str, str]] = {"lambda": "lambda_"}

    def to_dict(self) -> dict:
        return {
            **self.extra,
            "criterion": self.criterion,
            "lambda": self.lambda_,
            "lambdas": [_finite_or_none(v) for v in self.lambdas],
            "criterion_values": [_finite_or_none(v) for v in self.criterion_values],
            "coefs": [[_finite_or_none(v) for v in row] for row in self.coefs],
            "features": list(self.features),
        }

    @classmethod
    def from_dict(cls, d: dict) -> PathRecord:
        k, extra = _split(cls, d)
        lam = _floats(k.get("lambdas", ()))
        coefs = np.array([_floats(row) for row in k.get("coefs", ())], dtype=np.float64).reshape(
            len(lam), -1
        )
        return cls(
            lambdas=lam,
            coefs=coefs,
            features=tuple(str(f) for f in k.get("features", ())),
            criterion=str(k.get("criterion", "")),
            criterion_values=_floats(k.get("criterion_values", ())),
            lambda_=None if k.get("lambda_") is None else float(k["lambda_"]),
            extra=extra,
        )


@dataclass(frozen=True)
class FitRecord:
    """One iteration's penalised fit as the manifest records it.

    Attributes
    ----------
    union : ndarray of int of shape (u,)
        Store indices of the features fitted, increasing.
    index : ndarray of int of shape (k,)
        Store indices of the selected features (non-zero coefficients), increasing.
    coef : ndarray of shape (k,)
        Their coefficients per unit.
    intercept : float
        Intercept for the *centred* features (the model's intercept for features as stored is in
        `ModelRecord` and model.tsv).
    covariate_coef : ndarray of shape (q,)
    lambda_ : float or None
    criterion_value : float
    seconds : float
    path : PathRecord or None
    extra : dict
        Further keys of the fit (the extension point, for example refit coefficients).
    """

    union: np.ndarray
    index: np.ndarray
    coef: np.ndarray
    intercept: float
    covariate_coef: np.ndarray
    lambda_: float | None
    criterion_value: float
    seconds: float = 0.0
    path: PathRecord | None = None
    extra: dict = field(default_factory=dict)

    _keys: ClassVar[dict[str, str]] = {"lambda": "lambda_"}

    def to_dict(self) -> dict:
        return {
            **self.extra,
            "union": [int(v) for v in self.union],
            "index": [int(v) for v in self.index],
            "coef": [float(c) for c in self.coef],
            "intercept": float(self.intercept),
            "covariate_coef": [float(c) for c in self.covariate_coef],
            "lambda": None if self.lambda_ is None else float(self.lambda_),
            "criterion_value": float(self.criterion_value),
            "seconds": round(float(self.seconds), 3),
            "path": None if self.path is None else self.path.to_dict(),
        }

    @classmethod
    def from_dict(cls, d: dict) -> FitRecord:
        k, extra = _split(cls, d)
        return cls(
            union=np.asarray(k.get("union", ()), dtype=np.int64),
            index=np.asarray(k["index"], dtype=np.int64),
            coef=np.asarray(k["coef"], dtype=np.float64),
            intercept=float(k["intercept"]),
            covariate_coef=np.asarray(k.get("covariate_coef", ()), dtype=np.float64),
            lambda_=None if k.get("lambda_") is None else float(k["lambda_"]),
            criterion_value=float(k.get("criterion_value", float("nan"))),
            seconds=float(k.get("seconds", 0.0)),
            path=None if not k.get("path") else PathRecord.from_dict(k["path"]),
            extra=extra,
        )

    def coefficient_of(self, index: np.ndarray) -> np.ndarray:
        """Coefficients of the given store indices in this fit (0 for features not selected)."""
        index = np.asarray(index, dtype=np.int64)
        out = np.zeros(index.size)
        if self.index.size:
            pos = np.minimum(np.searchsorted(self.index, index), self.index.size - 1)
            hit = self.index[pos] == index
            out[hit] = self.coef[pos[hit]]
        return out


@dataclass(frozen=True)
class IterationRecord:
    """One iteration of a ``run`` (manifest key ``iterations``).

    Attributes
    ----------
    iteration : int
        0 for the marginal screen, k for the k-th conditional pass.
    passes : tuple of str
    threshold : tuple of dict
        Per pass: the rule, its cutoff, the features tested and kept.
    n_candidates : int
    candidates : ndarray of int
        Store indices of the new candidates, strongest first.
    entered, left : tuple of str
        Ids of the features that entered and left the selected set.
    selected_size : int
    pass_seconds : float
    refit : bool
        False when no candidate was new and the previous fit stands.
    model : FitRecord
    fit_token : str, optional
    """

    iteration: int
    passes: tuple[str, ...]
    threshold: tuple[dict, ...]
    n_candidates: int
    candidates: np.ndarray
    entered: tuple[str, ...]
    left: tuple[str, ...]
    selected_size: int
    pass_seconds: float
    refit: bool
    model: FitRecord
    fit_token: str | None = None
    extra: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        d = {
            **self.extra,
            "iteration": self.iteration,
            "passes": list(self.passes),
            "threshold": [dict(t) for t in self.threshold],
            "n_candidates": self.n_candidates,
            "candidates": [int(v) for v in self.candidates],
            "entered": list(self.entered),
            "left": list(self.left),
            "selected_size": self.selected_size,
            "pass_seconds": self.pass_seconds,
            "refit": self.refit,
            "model": self.model.to_dict(),
        }
        if self.fit_token is not None:
            d["fit_token"] = self.fit_token
        return d

    @classmethod
    def from_dict(cls, d: dict) -> IterationRecord:
        k, extra = _split(cls, d)
        thr = k.get("threshold", ())
        return cls(
            iteration=int(k["iteration"]),
            passes=tuple(k.get("passes", ())),
            threshold=tuple(thr) if isinstance(thr, list | tuple) else (thr,),
            n_candidates=int(k.get("n_candidates", 0)),
            candidates=np.asarray(k.get("candidates", ()), dtype=np.int64),
            entered=tuple(k.get("entered", ())),
            left=tuple(k.get("left", ())),
            selected_size=int(k["selected_size"]),
            pass_seconds=float(k.get("pass_seconds", 0.0)),
            refit=bool(k.get("refit", True)),
            model=FitRecord.from_dict(k["model"]),
            fit_token=k.get("fit_token"),
            extra=extra,
        )


@dataclass(frozen=True)
class ModelRecord:
    """The final model of a ``run`` (manifest key ``model``); the same numbers as model.tsv.

    Attributes
    ----------
    features : tuple of str
        Ids of the selected features, in model.tsv's order.
    index : ndarray of int
    coefficient : ndarray of float
        Per unit of each feature as stored (missing values at its mean).
    entered : ndarray of int
    intercept : float or None
        For the features as stored; None for the Cox family (no intercept).
    covariates : tuple of str
    covariate_coef : ndarray of float
    stop_reason : str
    """

    features: tuple[str, ...]
    index: np.ndarray
    coefficient: np.ndarray
    entered: np.ndarray
    intercept: float | None
    covariates: tuple[str, ...]
    covariate_coef: np.ndarray
    stop_reason: str = ""
    extra: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {
            **self.extra,
            "features": list(self.features),
            "index": [int(v) for v in self.index],
            "coefficient": [float(v) for v in self.coefficient],
            "entered": [int(v) for v in self.entered],
            "intercept": None if self.intercept is None else float(self.intercept),
            "covariates": list(self.covariates),
            "covariate_coef": [float(v) for v in self.covariate_coef],
            "stop_reason": self.stop_reason,
        }

    @classmethod
    def from_dict(cls, d: dict) -> ModelRecord:
        k, extra = _split(cls, d)
        return cls(
            features=tuple(k.get("features", ())),
            index=np.asarray(k.get("index", ()), dtype=np.int64),
            coefficient=np.asarray(k.get("coefficient", ()), dtype=np.float64),
            entered=np.asarray(k.get("entered", ()), dtype=np.int64),
            intercept=None if k.get("intercept") is None else float(k["intercept"]),
            covariates=tuple(k.get("covariates", ())),
            covariate_coef=np.asarray(k.get("covariate_coef", ()), dtype=np.float64),
            stop_reason=str(k.get("stop_reason", "")),
            extra=extra,
        )


# --------------------------------------------------------------------------------------------
# Sessions and the manifest


@dataclass(frozen=True)
class SessionRecord:
    """One process's work on the folder (manifest key ``sessions``).

    ``status`` is None while the session runs (or when it was killed before recording its end).
    """

    started: float | None = None
    ended: float | None = None
    status: str | None = None
    seconds: float | None = None
    resumed: bool = False
    pid: int | None = None
    host: str = ""
    versions: dict = field(default_factory=dict)
    extra: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        d = {**self.extra, "started": self.started, "resumed": self.resumed, "pid": self.pid}
        d.update(host=self.host, versions=dict(self.versions))
        if self.status is not None:
            d["status"] = self.status
        if self.ended is not None:
            d["ended"] = self.ended
        if self.seconds is not None:
            d["seconds"] = self.seconds
        return d

    @classmethod
    def from_dict(cls, d: dict) -> SessionRecord:
        k, extra = _split(cls, d)
        return cls(
            started=k.get("started"),
            ended=k.get("ended"),
            status=k.get("status"),
            seconds=None if k.get("seconds") is None else float(k["seconds"]),
            resumed=bool(k.get("resumed", False)),
            pid=k.get("pid"),
            host=str(k.get("host", "")),
            versions=dict(k.get("versions") or {}),
            extra=extra,
        )


@dataclass(frozen=True)
class ManifestRecord:
    """``manifest.json`` read as typed records (the parts a reader of results needs).

    Attributes
    ----------
    command : str
        ``screen`` or ``run``.
    status : str
    config : dict
        The configuration as recorded (keys of the workflow's config dataclass).
    dataset : dict
        ``path``, ``fingerprint``, ``shape`` of the store.
    samples : dict
        Counts of the outcome join.
    versions : dict
        Of the first session.
    sessions : tuple of SessionRecord
    passes : dict of str -> PassSummary
    iterations : tuple of IterationRecord
    model : ModelRecord or None
    shortlist_size, size_budget : int or None
    stop_reason : str or None
    seconds_total : float or None
        Wall time of the last session's command.
    """

    command: str
    status: str
    config: dict
    dataset: dict
    samples: dict
    versions: dict
    sessions: tuple[SessionRecord, ...]
    passes: dict[str, PassSummary]
    iterations: tuple[IterationRecord, ...]
    model: ModelRecord | None
    shortlist_size: int | None
    size_budget: int | None
    stop_reason: str | None
    seconds_total: float | None
    extra: dict = field(default_factory=dict)

    @classmethod
    def from_dict(cls, d: dict) -> ManifestRecord:
        k, extra = _split(cls, d)
        return cls(
            command=str(k.get("command", "")),
            status=str(k.get("status", "")),
            config=dict(k.get("config") or {}),
            dataset=dict(k.get("dataset") or {}),
            samples=dict(k.get("samples") or {}),
            versions=dict(k.get("versions") or {}),
            sessions=tuple(SessionRecord.from_dict(s) for s in k.get("sessions") or ()),
            passes={n: PassSummary.from_dict(p) for n, p in (k.get("passes") or {}).items()},
            iterations=tuple(IterationRecord.from_dict(r) for r in k.get("iterations") or ()),
            model=None if not k.get("model") else ModelRecord.from_dict(k["model"]),
            shortlist_size=None if k.get("shortlist_size") is None else int(k["shortlist_size"]),
            size_budget=None if k.get("size_budget") is None else int(k["size_budget"]),
            stop_reason=k.get("stop_reason"),
            seconds_total=None if k.get("seconds_total") is None else float(k["seconds_total"]),
            extra=extra,
        )

    def to_dict(self) -> dict:
        d: dict[str, Any] = {
            **self.extra,
            "command": self.command,
            "status": self.status,
            "config": self.config,
            "dataset": self.dataset,
            "samples": self.samples,
            "versions": self.versions,
            "sessions": [s.to_dict() for s in self.sessions],
            "passes": {n: p.to_dict() for n, p in self.passes.items()},
        }
        if self.iterations:
            d["iterations"] = [r.to_dict() for r in self.iterations]
        if self.model is not None:
            d["model"] = self.model.to_dict()
        for key in ("shortlist_size", "size_budget", "stop_reason", "seconds_total"):
            if getattr(self, key) is not None:
                d[key] = getattr(self, key)
        return d

    @property
    def shortlist(self) -> int | None:
        """The shortlist size d: ``shortlist_size`` of a screen, ``size_budget`` of a run."""
        return self.shortlist_size if self.shortlist_size is not None else self.size_budget


__all__ = [
    "FitRecord",
    "IterationRecord",
    "ManifestRecord",
    "ModelRecord",
    "PassMeta",
    "PassSummary",
    "PathRecord",
    "SessionRecord",
]
