"""scikit-learn-compatible estimators over arrays, Dask arrays and dataset stores."""

from ._model import IterativeScreeningModel
from ._selector import ScreeningSelector
from ._target import concordance_index
from ._view import StoreView

__all__ = ["IterativeScreeningModel", "ScreeningSelector", "StoreView", "concordance_index"]
