"""The response y as each family takes it from an array, and the score that fits each family.

- quantitative families: a 1-d float y;
- ``logistic``: any two labels (numbers or text), coded in sorted order (first -> 0), as
  `sklearn.preprocessing.LabelEncoder` and the command line do; the labels become ``classes_``;
- ``poisson``: non-negative integer counts;
- ``cox``: a numpy structured array with a boolean event field and a float time field (the form
  Python survival libraries commonly use: common practice), or two columns (time, event), or a
  DataFrame of two such columns.
"""

from __future__ import annotations

import numpy as np
from sklearn.utils.multiclass import check_classification_targets, type_of_target
from sklearn.utils.validation import check_array, column_or_1d

from ..families import Family, Response


def no_target(estimator) -> ValueError:
    # The wording scikit-learn's check_requires_y_none looks for.
    return ValueError(
        f"{type(estimator).__name__} requires y to be passed, but the target y is None."
    )


def read_target(family: Family, y) -> tuple[Response, np.ndarray | None]:
    """The family's response from y (already aligned with X's samples), and the class labels."""
    if family.loss == "cox":
        return survival_target(y), None
    if family.loss == "binomial":
        return binary_target(y)
    y = column_or_1d(
        check_array(y, ensure_2d=False, dtype=np.float64, input_name="y", ensure_min_samples=0),
        warn=True,
    )
    if family.loss == "poisson":
        bad = (y < 0) | (y != np.round(y))
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise ValueError(
                f"y[{i}] = {float(y[i])!r} is not a non-negative integer count (family 'poisson')"
            )
        if y.size and y.max() == 0:
            raise ValueError("y is zero for every sample (family 'poisson')")
    return Response(y=y), None


def binary_target(y) -> tuple[Response, np.ndarray]:
    """0/1 codes of two labels (sorted order) and the labels."""
    y = column_or_1d(np.asarray(y), warn=True)
    check_classification_targets(y)
    classes, code = np.unique(y, return_inverse=True)
    if classes.size == 1:
        raise ValueError(f"y has a single class ({classes[0]!r}); a binary outcome needs two")
    y_type = type_of_target(y, input_name="y")
    if y_type != "binary":
        # The wording scikit-learn's check_classifier_not_supporting_multiclass looks for.
        raise ValueError(
            f"Only binary classification is supported. The type of the target is {y_type}."
        )
    mapping = {str(classes[0]): 0, str(classes[1]): 1}
    return Response(y=code.astype(np.float64), mapping=mapping), classes


def survival_target(y) -> Response:
    """(time, event) from a structured array, a two-column array or a two-column DataFrame."""
    if y is None:
        raise ValueError("family 'cox' needs y = (time, event)")
    if hasattr(y, "columns") and hasattr(y, "iloc"):
        cols = list(y.columns)
        if len(cols) != 2:
            raise ValueError(
                f"family 'cox' needs y with two columns (time, event); got columns {cols}"
            )
        kinds = [y[c].dtype.kind for c in cols]
        if kinds.count("b") == 1:
            e_col = cols[kinds.index("b")]
            t_col = cols[1 - kinds.index("b")]
        else:
            t_col, e_col = cols
        time, event = y[t_col].to_numpy(), y[e_col].to_numpy()
    else:
        arr = np.asarray(y)
        if arr.dtype.names:
            names = arr.dtype.names
            flags = [n for n in names if arr.dtype[n].kind == "b"]
            nums = [n for n in names if arr.dtype[n].kind in "fiu"]
            if len(names) != 2 or len(flags) != 1 or len(nums) != 1:
                raise ValueError(
                    "family 'cox' needs a structured y with a boolean event field and a float "
                    f"time field; got fields {list(names)} of kinds "
                    f"{[arr.dtype[n].kind for n in names]}"
                )
            time, event = arr[nums[0]].ravel(), arr[flags[0]].ravel()
        else:
            if arr.ndim != 2 or arr.shape[1] != 2:
                raise ValueError(
                    "family 'cox' needs y as a structured array (boolean event, float time) or "
                    f"two columns (time, event); got shape {arr.shape}"
                )
            time, event = arr[:, 0], arr[:, 1]
    time = check_array(time, ensure_2d=False, dtype=np.float64, input_name="time")
    event = check_array(event, ensure_2d=False, dtype=np.float64, input_name="event")
    bad = time <= 0
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise ValueError(f"time[{i}] = {float(time[i])!r} is not a positive time (family 'cox')")
    bad = ~np.isin(event, (0.0, 1.0))
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise ValueError(
            f"event[{i}] = {float(event[i])!r} is not an event indicator (1 event, 0 censored)"
        )
    if event.sum() == 0:
        raise ValueError("y has no events (family 'cox')")
    return Response(y=time, event=event)


def target_length(y) -> int:
    return len(y) if hasattr(y, "__len__") else np.asarray(y).shape[0]


def concordance_index(time: np.ndarray, event: np.ndarray, risk: np.ndarray) -> float:
    """Harrell's C: among usable pairs (the shorter time is an event), the share where the shorter
    time has the higher risk; risk ties count one half (Harrell et al. 1982, JAMA 247:2543).

    Vectorised over pairs through sorting: for each event time t_i, the samples still at risk
    (time > t_i) are counted by their risk relative to risk_i with two searchsorted calls per
    distinct event, so the cost is O(n log n) per event, without an n x n matrix.
    """
    time = np.asarray(time, dtype=np.float64)
    event = np.asarray(event, dtype=bool)
    risk = np.asarray(risk, dtype=np.float64)
    order = np.argsort(time, kind="stable")
    time, event, risk = time[order], event[order], risk[order]
    # Suffix sorted risks: samples with a strictly longer time than t_i are those after the last
    # index with time == t_i.
    after = np.searchsorted(time, time, side="right")
    concordant = 0.0
    usable = 0.0
    for start in np.unique(after[event]):
        later = np.sort(risk[start:])
        here = event & (after == start)
        r = risk[here]
        lo = np.searchsorted(later, r, side="left")
        hi = np.searchsorted(later, r, side="right")
        concordant += float(np.sum(lo) + 0.5 * np.sum(hi - lo))
        usable += float(r.size * later.size)
    if usable == 0:
        raise ValueError("no usable pairs for the concordance index (no event before a later time)")
    return concordant / usable


__all__ = ["binary_target", "concordance_index", "read_target", "survival_target"]
