"""scikit-learn-compatible estimators over arrays, Dask arrays and dataset stores."""

from ._selector import ScreeningSelector

__all__ = ["ScreeningSelector"]

from ._model import IterativeScreeningModel

__all__ += ["IterativeScreeningModel"]
