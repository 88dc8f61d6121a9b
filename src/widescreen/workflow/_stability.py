"""Stability selection with complementary pairs (``run --stability B``).

Shah & Samworth (2013, JRSS-B 75:55), after Meinshausen & Buhlmann (2010, JRSS-B 72:417): B random
splits of the samples into two halves (a complementary pair: disjoint, together all samples; see
`complementary_pairs`), the screen -> refit pipeline on each of the 2B halves (`_subsets`: one screen
per half, one read of the union of their shortlists, one refit per half), and per feature its
selection frequency, the share of the 2B halves whose refit selected it. The stable set is the
features selected in at least a share ``threshold`` (pi_thr) of the halves.

Error control. With q the expected number of features a half's pipeline selects (estimated by the
mean over the 2B halves) out of p screened, the expected number of falsely selected features V in the
stable set obeys

- Meinshausen & Buhlmann (2010, Theorem 1), which Shah & Samworth (2013, Theorem 1) show holds for
  complementary pairs without their exchangeability and better-than-random conditions (as a bound on
  the low-selection-probability features):  E[V] <= q^2 / ((2 pi_thr - 1) p),  1/2 < pi_thr <= 1;
- Shah & Samworth (2013, Section 3.3, eq. 8), assuming the selection frequencies of those features
  have a unimodal distribution: E[V] <= C(pi_thr, B) q^2 / p, with
  C = 1 / (2 (2 pi_thr - 1 - 1 / (2B))) for pi_thr in (min(1/2 + q/p, 1/2 + 1/(2B) + 3q/(4p)), 3/4]
  and C = 4 (1 - pi_thr + 1/(2B)) / (1 + 1/B) for pi_thr in (3/4, 1]; undefined below that range.

Their sharper bound under r-concavity needs a numerical optimisation over distributions and is not
computed. The bounds count features, not samples; they are about the selection procedure (screen and
refit on n/2 samples), which is why q is measured on the halves.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ._problem import Problem, shortlist_size
from ._resample import complementary_pairs, strata_of
from ._subsets import (
    FIT_ERRORS,
    SubsetScreen,
    fit_subset,
    read_union,
    refit_progress,
    screen_subsets,
    timed,
)


def mb_bound(q: float, p: int, threshold: float) -> float:
    """Meinshausen & Buhlmann (2010, JRSS-B 72:417, Theorem 1): E[V] <= q^2 / ((2 pi_thr - 1) p).

    Parameters
    ----------
    q : float
        Expected number of features selected per half.
    p : int
        Features the selection chose from.
    threshold : float
        pi_thr, in (1/2, 1].
    """
    if not 0.5 < threshold <= 1.0:
        raise ValueError(f"the threshold must be in (0.5, 1]; got {threshold}")
    return float(q) ** 2 / ((2.0 * threshold - 1.0) * float(p))


def ss_unimodal_bound(q: float, p: int, threshold: float, n_pairs: int) -> float | None:
    """Shah & Samworth (2013, JRSS-B 75:55, eq. 8): the bound on E[V] for complementary pairs under
    unimodality, C(pi_thr, B) q^2 / p; None where pi_thr is below the range the bound covers."""
    theta = float(q) / float(p)
    b = float(n_pairs)
    if 0.75 < threshold <= 1.0:
        c = 4.0 * (1.0 - threshold + 1.0 / (2.0 * b)) / (1.0 + 1.0 / b)
    elif min(0.5 + theta, 0.5 + 1.0 / (2.0 * b) + 0.75 * theta) < threshold <= 0.75:
        c = 1.0 / (2.0 * (2.0 * threshold - 1.0 - 1.0 / (2.0 * b)))
    else:
        return None
    return c * theta * float(q)


@dataclass
class StabilityResult:
    """Selection frequencies of the features over 2B half-samples, and the stable set.

    Attributes
    ----------
    n_pairs : int
        B.
    threshold : float
        pi_thr.
    index : ndarray of int of shape (m,)
        Store indices of every feature selected in at least one half, increasing.
    frequency : ndarray of shape (m,)
        Their selection frequencies (share of the 2B halves).
    stable : ndarray of int
        Store indices of the stable set (frequency >= threshold), most frequent first, then by index.
    q : float
        Mean number of features selected per half.
    p : int
        Features screened (the bound's p).
    bound_mb, bound_ss : float, float or None
        The two bounds on the expected number of false selections (see the module's docstring).
    shortlist : int
        Shortlist size of each half.
    selected_sizes : list of int
        Per half analysed, in the order pair 1 a, pair 1 b, pair 2 a, ...
    seconds : dict
        Wall time of the phases run in this session (screen, read, fit).
    skipped : list of str
        Halves that could not be screened or refitted, and why; the frequencies are shares of the
        other halves.
    """

    n_pairs: int
    threshold: float
    index: np.ndarray
    frequency: np.ndarray
    stable: np.ndarray
    q: float
    p: int
    bound_mb: float
    bound_ss: float | None
    shortlist: int
    selected_sizes: list[int]
    seconds: dict = field(default_factory=dict)
    skipped: list[str] = field(default_factory=list)

    def frequency_of(self, index: np.ndarray) -> np.ndarray:
        """Selection frequencies of the given store indices (0 for a feature never selected)."""
        index = np.asarray(index, dtype=np.int64)
        out = np.zeros(index.size)
        if self.index.size:
            pos = np.minimum(np.searchsorted(self.index, index), self.index.size - 1)
            found = self.index[pos] == index
            out[found] = self.frequency[pos[found]]
        return out

    def record(self, problem: Problem) -> dict:
        """The manifest's summary (the per-half records are kept beside it)."""
        return {
            "n_pairs": self.n_pairs,
            "threshold": self.threshold,
            "shortlist": self.shortlist,
            "q": self.q,
            "p": self.p,
            "bound_mb": self.bound_mb,
            "bound_ss_unimodal": self.bound_ss,
            "stable": [str(f) for f in problem.feature_ids(self.stable)],
            "seconds": self.seconds,
            "n_halves_used": len(self.selected_sizes),
            "skipped": self.skipped,
        }


def stability_selection(
    where: SubsetScreen,
    *,
    n_pairs: int,
    threshold: float,
    shortlist: int | str,
    settings,
    seed: int,
    n_candidates: int,
    state: dict | None = None,
    save=None,
) -> StabilityResult:
    """Stability selection of the screen -> refit pipeline over ``n_pairs`` complementary pairs.

    Parameters
    ----------
    where : SubsetScreen
    n_pairs : int
        B (2B halves).
    threshold : float
        pi_thr in (1/2, 1].
    shortlist : int or "auto"
        The run's shortlist rule, applied to a half's sample size.
    settings : FitSettings
        The run's refit.
    seed : int
    n_candidates : int
        Features the run screened (the EBIC's and the bound's p).
    state : dict, optional
        The manifest's record of this step (``halves``: per half its ``shortlist`` and
        ``selected``), updated in place; what it holds is reused (resume).
    save : callable(), optional
        Called after each update of ``state`` (the session's manifest save).
    """
    problem = where.problem
    n = problem.n
    pairs = complementary_pairs(n, n_pairs, seed, strata_of(problem))
    halves = [h for pair in pairs for h in pair]
    names = [f"stability_{b + 1:03d}{s}" for b in range(n_pairs) for s in "ab"]
    d = shortlist_size(shortlist, min(h.size for h in halves), problem.n_features)
    state = {} if state is None else state
    recs = state.get("halves")
    if not isinstance(recs, list) or len(recs) != len(halves) or state.get("shortlist") != d:
        recs = [{} for _ in halves]
    state.update(halves=recs, shortlist=d)
    seconds: dict[str, float] = {}

    spent = screen_subsets(
        where, halves, recs, shortlist=d, names=names, label="stability halves", save=save
    )
    if spent is not None:
        seconds["screen"] = spent

    tofit = [i for i, r in enumerate(recs) if "selected" not in r and "error" not in r]
    if tofit:
        lists = [np.asarray(recs[i]["shortlist"], dtype=np.int64) for i in tofit]
        (union, raw), seconds["read"] = timed(read_union, problem, lists, where.sub_block)
        fit_seconds = 0.0
        tick = refit_progress(where, "stability refits", len(tofit))
        for i, top in zip(tofit, lists, strict=True):
            try:
                fit, s = timed(
                    fit_subset, problem, halves[i], top, union, raw, settings, n_candidates
                )
            except FIT_ERRORS as exc:
                recs[i]["error"] = f"the refit failed: {exc}"
            else:
                fit_seconds += s
                recs[i]["selected"] = [int(j) for j in fit.model.index]
            if save is not None:
                save()
            tick()
        seconds["fit"] = fit_seconds

    used = [r for r in recs if "error" not in r]
    skipped = [
        f"half-sample {names[i].split('_')[1]}: {r['error']}"
        for i, r in enumerate(recs)
        if "error" in r
    ]
    if not used:
        raise ValueError(f"stability selection: no half-sample could be analysed ({skipped[0]})")
    selected = [np.asarray(r["selected"], dtype=np.int64) for r in used]
    every = np.concatenate(selected)
    index, counts = np.unique(every, return_counts=True)
    frequency = counts / float(len(used))
    stable_mask = frequency >= threshold - 1e-12
    order = np.lexsort((index[stable_mask], -frequency[stable_mask]))
    sizes = [int(s.size) for s in selected]
    q = float(np.mean(sizes)) if sizes else 0.0
    p = max(int(n_candidates), 1)
    return StabilityResult(
        n_pairs=n_pairs,
        threshold=float(threshold),
        index=index,
        frequency=frequency,
        stable=index[stable_mask][order],
        q=q,
        p=p,
        bound_mb=mb_bound(q, p, threshold),
        bound_ss=ss_unimodal_bound(q, p, threshold, n_pairs),
        shortlist=d,
        selected_sizes=sizes,
        seconds={k: round(v, 3) for k, v in seconds.items()},
        skipped=skipped,
    )


__all__ = ["StabilityResult", "mb_bound", "ss_unimodal_bound", "stability_selection"]
