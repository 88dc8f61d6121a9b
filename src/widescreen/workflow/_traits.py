"""Several traits in one run folder: one pass over the store for all of them, a ranking (and a model)
per trait.

``--response a,b,c`` names K columns of the outcome table. The samples analysed are those in the store
with every covariate and at least one trait; each trait keeps the samples that have a value of it (NaN
elsewhere in the response matrix), and its statistics are those of a run on those samples alone
(`screen_responses`). The run folder (layout in `widescreen.schema.RunLayout`)::

    OUT/manifest.json            the command, its configuration, the traits, the shared pass
    OUT/passes/screen/           the one pass for all traits (statistics of shape (features, K))
    OUT/traits.tsv               one row per trait (`widescreen.schema.TRAITS`)
    OUT/traits/NAME/             a run folder per trait: manifest.json, ranking.tsv; for run its own
                                 conditional passes, model.tsv, iterations.tsv, entries.tsv

A trait's ``passes/screen/shared.json`` points to the shared pass (its column), so everything that reads
a trait's folder (its tables, the report) finds its statistics there. ``run`` shares the first pass and
then iterates per trait (conditional passes depend on each trait's model); with ``--split`` or the
permutation threshold each trait screens on its own. Resume is as for one trait: the top folder's lock
covers the trait folders, a rerun reuses the finished blocks of the shared pass and each trait's
finished passes and fits.

Memory: the shared pass holds, per worker thread, a block's statistics for all K traits (about
2 x (columns + 3) x K x block width x 8 bytes) and the products of the block with the K traits; the
engine's memory plan counts them (`widescreen.engine.plan_memory`). Trait tables are written one trait at
a time, reading its statistics at its shortlist only.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass, replace

import numpy as np

from ..engine import RunFolder, as_source, atomic_write
from ..families import Response, get_family
from ..schema import RANKING, TRAITS, format_table, shared_record
from ..store import OutcomeError, join_outcome, read_outcome_table
from ..store._outcome import is_missing
from ._candidates import pass_lambda_gc
from ._iterate import IterateConfig, iterate
from ._problem import (
    Problem,
    _check_response_varies,
    analysed_rows,
    check_covariates,
    check_sample_size,
    shortlist_size,
    table_covariates,
    trait_names,
)
from ._responses import screen_responses, shortlist_values
from ._run import finish_run
from ._screen import ScreenConfig, dataset_record, record_problem
from ._session import RunSession, _session_entry, open_session, versions
from ._tables import ranking_text


@dataclass(frozen=True)
class Traits:
    """Several traits joined to a store: the shared problem, the response matrix, each trait's problem.

    Attributes
    ----------
    problem : Problem
        Samples with every covariate and at least one trait; its ``response`` is the first trait with
        NaN where it is missing (not used by the shared pass).
    Y : ndarray of shape (n, K)
        The traits, coded by the family, NaN where a sample has no value.
    names : tuple of str
    responses : tuple of Response
        Each trait's validated response on its own samples.
    """

    problem: Problem
    Y: np.ndarray
    names: tuple[str, ...]
    responses: tuple[Response, ...]

    def rows_of(self, k: int) -> np.ndarray:
        """Positions (among the shared problem's samples) of trait k's samples."""
        return np.flatnonzero(np.isfinite(self.Y[:, k]))

    def problem_of(self, k: int) -> Problem:
        """Trait k's problem: its samples only, as a one-trait run would build it."""
        base, sel = self.problem, self.rows_of(k)
        joined = _subjoin(base.joined, sel)
        rows = sel if base.rows is None else base.rows[sel]
        return replace(
            base,
            response=self.responses[k],
            covariates=None if base.covariates is None else base.covariates[sel],
            rows=analysed_rows(rows, base.source.n_samples),
            sample_ids=None if base.sample_ids is None else base.sample_ids[sel],
            samples=joined.report(),
            joined=joined,
        )


def _subjoin(joined, sel: np.ndarray):
    return replace(
        joined,
        rows=joined.rows[sel],
        sample_ids=joined.sample_ids[sel],
        values={c: v[sel] for c, v in joined.values.items()},
        lines=joined.lines[sel],
        n_dropped=int(joined.n_dropped + joined.rows.size - sel.size),
    )


def load_traits(
    store, outcome, *, responses: tuple[str, ...], family: str, covariates: tuple[str, ...] = ()
) -> Traits:
    """Join an outcome table's trait columns and covariates to a store (the file route of many traits).

    Raises
    ------
    OutcomeError
        A family without a response-matrix pass, a bad value (naming file, column and line), a trait
        that is constant or explained by the covariates, or too few samples for one.
    """
    source = as_source(store)
    fam = get_family(family)
    if fam.multi_kernel is None or fam.takes_event:
        raise OutcomeError(
            f"the {fam.name} family screens one response at a time; --response names "
            f"{len(responses)} columns"
        )
    table = read_outcome_table(outcome)
    dataset = getattr(source, "dataset", None)
    if dataset is None:
        raise ValueError("an outcome table can only be joined to a dataset store")
    joined = join_outcome(dataset.sample_ids(), table, list(covariates), any_of=list(responses))
    Z, names, coding = table_covariates(joined, covariates, table.path)
    n = joined.n
    Y = np.full((n, len(responses)), np.nan)
    coded_responses = []
    for k, name in enumerate(responses):  # once per trait: validation of its own values
        sel = np.flatnonzero(~is_missing(joined.values[name]))
        where = f"{table.path}: trait {name!r}: "
        check_sample_size(sel.size, len(names), where)
        resp = fam.response(_subjoin(joined, sel), name)
        Zk = None if Z is None else Z[sel]
        if Zk is not None:
            check_covariates(Zk, names, where)
        _check_response_varies(table.path, name, np.asarray(resp.y, dtype=np.float64), Zk)
        Y[sel, k] = resp.y
        coded_responses.append(resp)
    problem = Problem(
        source=source,
        family=fam,
        response=Response(y=Y[:, 0]),
        covariates=Z,
        covariate_names=names,
        rows=analysed_rows(joined.rows, source.n_samples),
        sample_ids=joined.sample_ids,
        samples=joined.report(),
        joined=joined,
        covariate_coding=coding,
    )
    return Traits(problem, Y, tuple(responses), tuple(coded_responses))


# --------------------------------------------------------------------------------------------
# The trait folders


class _Covered:
    """The lock of a trait folder: the top run folder's lock covers it."""

    def release(self) -> None:
        pass


def trait_session(
    parent: RunSession,
    name: str,
    command: str,
    config: dict,
    dataset: dict,
    *,
    response: int | None,
) -> RunSession:
    """Open (or resume) the run folder of one trait, ``traits/NAME`` under the parent's lock.

    Its manifest is kept when it was made by the same command, configuration and data (the parent
    checked its own already); otherwise the folder starts over. With ``response`` its screening pass
    is column ``response`` of the parent's shared pass (``passes/screen/shared.json``).
    """
    run = RunFolder(parent.run.layout.trait(name))
    old = run.read_manifest() if run.manifest_path.is_file() else None
    same = (
        old is not None
        and old.get("command") == command
        and old.get("config") == config
        and old.get("dataset", {}).get("fingerprint") == dataset["fingerprint"]
    )
    if not same and run.path.exists():
        run.clear()
    if same:
        manifest = old
        for prev in manifest.setdefault("sessions", []):
            prev.setdefault("status", "interrupted")
        manifest["sessions"].append(_session_entry(resumed=True))
        manifest["status"] = "running"
    else:
        manifest = {
            "command": command,
            "config": config,
            "dataset": dataset,
            "versions": versions(),
            "status": "running",
            "sessions": [_session_entry(resumed=False)],
        }
    if response is not None:
        manifest["shared_pass"] = {"screen": {"run": "../..", "response": int(response)}}
        atomic_write(run.layout.pass_("screen").shared, shared_record("../..", response))
    session = RunSession(run=run, lock=_Covered(), manifest=manifest, resumed=same)
    session.save()
    return session


def traits_text(rows: list[dict]) -> str:
    cols = {c.name: [r[c.name] for r in rows] for c in TRAITS.fixed}
    return format_table(TRAITS, cols)


@dataclass
class TraitsResult:
    """What a run over several traits found.

    Attributes
    ----------
    names : tuple of str
    results : list
        Per trait: its `ScreenResult` (screen) or `IterativeResult` (run).
    summary : list of dict
        The rows of traits.tsv.
    pass_result : PassResult or None
        The shared pass (None when each trait screened on its own).
    run : RunFolder
    """

    names: tuple[str, ...]
    results: list
    summary: list[dict]
    pass_result: object
    run: RunFolder


def _open(store, outcome, config, out, command, restart):
    names = trait_names(config.response)
    traits = load_traits(
        store, outcome, responses=names, family=config.family, covariates=config.covariates
    )
    config.filters.check(traits.problem.source.value_kind)
    session = open_session(
        out, command, config.to_dict(), dataset_record(traits.problem), restart=restart
    )
    record_problem(session, traits.problem)  # each trait's response coding is in its own folder
    session.manifest["traits"] = list(names)
    return traits, session


def _shared_pass(
    traits: Traits,
    config,
    session: RunSession,
    *,
    scheduler,
    progress,
    memory_budget,
    list_top: int | None = None,
) -> tuple[list, object]:
    """The one pass of every trait into ``passes/screen/``: each trait's `ScreenResult` and the pass."""
    found = screen_responses(
        traits.problem,
        traits.Y,
        shortlist=config.shortlist,
        names=traits.names,
        list_top=list_top,
        filters=config.filters,
        sub_block=config.sub_block,
        keep_values=False,
        run=session.run,
        scheduler=scheduler,
        progress=progress,
        memory_budget=memory_budget,
    )
    merged = found[0].extra["pass"]
    session.record_pass("screen", merged.summary())
    return found, merged


def _trait_row(name: str, problem: Problem, top, shortlist: int, selected, lam) -> dict:
    """A trait's row of traits.tsv (its strongest feature: the first of its pass's top list)."""
    feature = score = None
    if top.index.size:
        feature, score = str(problem.feature_ids(top.index[:1])[0]), float(top.score[0])
    return {
        "trait": name,
        "n": problem.n,
        "shortlist_size": int(shortlist),
        "selected_size": selected,
        "top_feature": feature,
        "top_score": score,
        "lambda_gc": lam,
    }


def screen_traits(
    store: str | os.PathLike,
    outcome: str | os.PathLike,
    config: ScreenConfig,
    out: str | os.PathLike,
    *,
    scheduler=None,
    progress=None,
    restart: bool = False,
    memory_budget: int | str | None = None,
) -> TraitsResult:
    """`screen` of several traits (``config.response`` = "a,b,c"): one pass, a ranking per trait."""
    t0 = time.perf_counter()
    traits, session = _open(store, outcome, config, out, "screen", restart)
    with session:
        session.manifest["memory_budget"] = memory_budget
        found, merged = _shared_pass(
            traits,
            config,
            session,
            list_top=config.list_top,
            scheduler=scheduler,
            progress=progress,
            memory_budget=memory_budget,
        )
        rows = []
        for k, (name, res) in enumerate(zip(traits.names, found, strict=True)):
            problem = traits.problem_of(k)
            conf = replace(config, response=name)
            with trait_session(
                session, name, "screen", conf.to_dict(), dataset_record(problem), response=k
            ) as sub:
                record_problem(sub, problem)
                view = res.pass_result
                sub.manifest["shortlist_size"] = int(res.index.size)
                sub.record_pass("screen", view.summary())
                lam = pass_lambda_gc(problem, sub.run, view, np.empty(0, dtype=np.int64))
                sub.manifest["lambda_gc"] = {"screen": lam}
                res.lambda_gc = lam
                top = view.topk
                shortlisted = np.arange(top.index.size) < res.index.size
                text = ranking_text(problem, sub.run, view, top.index, top.score, shortlisted)
                sub.run.write_table(RANKING.file, text)
                sub.finish()
            rows.append(_trait_row(name, problem, top, res.index.size, None, lam))
        session.run.write_table(TRAITS.file, traits_text(rows))
        session.manifest["lambda_gc"] = {r["trait"]: r["lambda_gc"] for r in rows}
        session.finish(seconds_total=round(time.perf_counter() - t0, 3))
        return TraitsResult(traits.names, found, rows, merged, session.run)


def run_traits(
    store: str | os.PathLike,
    outcome: str | os.PathLike,
    config: IterateConfig,
    out: str | os.PathLike,
    *,
    scheduler=None,
    progress=None,
    restart: bool = False,
    memory_budget: int | str | None = None,
) -> TraitsResult:
    """`run` of several traits: the first pass shared by all, then each trait's iteration."""
    t0 = time.perf_counter()
    traits, session = _open(store, outcome, config, out, "run", restart)
    with session:
        session.manifest["memory_budget"] = memory_budget
        share = not config.split and config.rule.kind != "permutation"
        found, merged = None, None
        if share:
            found, merged = _shared_pass(
                traits,
                config,
                session,
                scheduler=scheduler,
                progress=None if progress is None else progress("screen"),
                memory_budget=memory_budget,
            )
        rows, results = [], []
        p = traits.problem.source.n_features
        for k, name in enumerate(traits.names):
            problem = traits.problem_of(k)
            conf = replace(config, response=name)
            first = None
            if share:
                res = found[k]
                d = shortlist_size(config.shortlist, problem.n, p, memory_budget)
                values = shortlist_values(traits.problem, res, config.sub_block)
                top = res.pass_result.topk
                first = replace(
                    res.pass_result,
                    topk=replace(
                        top,
                        index=top.index[:d],
                        score=top.score[:d],
                        values=np.asfortranarray(values[traits.rows_of(k)][:, :d]),
                    ),
                )
            with trait_session(
                session,
                name,
                "run",
                conf.to_dict(),
                dataset_record(problem),
                response=k if share else None,
            ) as sub:
                record_problem(sub, problem)
                sub.manifest["memory_budget"] = memory_budget
                result = iterate(
                    problem,
                    conf,
                    session=sub,
                    scheduler=scheduler,
                    progress=progress,
                    memory_budget=memory_budget,
                    first=first,
                )
                finish_run(sub, problem, conf, result, scheduler, progress, memory_budget)
                screen0 = result.screen[0]
                lam = None
                if not config.split:
                    lam = pass_lambda_gc(problem, sub.run, screen0, np.empty(0, dtype=np.int64))
                sub.finish()
            results.append(result)
            top = screen0.topk
            rows.append(_trait_row(name, problem, top, result.budget, int(result.index.size), lam))
        session.run.write_table(TRAITS.file, traits_text(rows))
        session.finish(seconds_total=round(time.perf_counter() - t0, 3))
        return TraitsResult(traits.names, results, rows, merged, session.run)


__all__ = ["Traits", "TraitsResult", "load_traits", "run_traits", "screen_traits", "trait_session"]
