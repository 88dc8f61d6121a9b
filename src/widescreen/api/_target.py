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

from dataclasses import dataclass

import numpy as np
from sklearn.utils.multiclass import check_classification_targets, type_of_target
from sklearn.utils.validation import check_array, column_or_1d

from ..families import Family
from ..workflow import concordance_index


def no_target(estimator) -> ValueError:
    # The wording scikit-learn's check_requires_y_none looks for.
    return ValueError(
        f"{type(estimator).__name__} requires y to be passed, but the target y is None."
    )


@dataclass(frozen=True)
class Target:
    """y taken apart for a family: the values and event indicator it validates, and the labels.

    Attributes
    ----------
    y : ndarray of shape (n,)
        The response as the family codes it (survival: the time; binary: the labels as given).
    event : ndarray of shape (n,) or None
        Survival only.
    classes : ndarray of shape (2,) or None
        Binary families: the two labels, sorted (the second is coded 1, as the family codes it).
    """

    y: np.ndarray
    event: np.ndarray | None = None
    classes: np.ndarray | None = None


def read_target(family: Family, y) -> Target:
    """y (aligned with X's samples) in the shape ``family`` takes; the family validates the values.

    Only what scikit-learn's conventions add is checked here (its wording for NaN, a 2-d column y,
    a continuous y given to a classifier, more than two classes); the family's own rules (counts,
    positive times, event indicators) are applied by `widescreen.workflow.Problem.from_arrays`.
    """
    if family.takes_event:
        time, event = survival_target(y)
        return Target(time, event)
    if family.loss == "binomial":
        return binary_target(y)
    y = check_array(y, ensure_2d=False, dtype=np.float64, input_name="y", ensure_min_samples=0)
    return Target(column_or_1d(y, warn=True))


def binary_target(y) -> Target:
    """Two labels (numbers or text) and the sorted labels."""
    y = column_or_1d(np.asarray(y), warn=True)
    check_classification_targets(y)
    classes = np.unique(y)
    if classes.size == 1:
        raise ValueError(f"y has a single class ({classes[0]!r}); a binary outcome needs two")
    y_type = type_of_target(y, input_name="y")
    if y_type != "binary":
        # The wording scikit-learn's check_classifier_not_supporting_multiclass looks for.
        raise ValueError(
            f"Only binary classification is supported. The type of the target is {y_type}."
        )
    return Target(y, None, classes)


def survival_target(y) -> tuple[np.ndarray, np.ndarray]:
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
        return y[t_col].to_numpy(), y[e_col].to_numpy()
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
        return arr[nums[0]].ravel(), arr[flags[0]].ravel()
    if arr.ndim != 2 or arr.shape[1] != 2:
        raise ValueError(
            "family 'cox' needs y as a structured array (boolean event, float time) or "
            f"two columns (time, event); got shape {arr.shape}"
        )
    return arr[:, 0], arr[:, 1]


def target_length(y) -> int:
    return len(y) if hasattr(y, "__len__") else np.asarray(y).shape[0]


__all__ = ["Target", "binary_target", "concordance_index", "read_target", "survival_target"]
