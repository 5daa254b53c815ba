"""Small array helpers shared by the modules."""
from __future__ import annotations

import numpy as np

__all__ = ["sorted_distinct"]


def sorted_distinct(a) -> np.ndarray:
    """``np.unique(a)`` (sorted distinct values, the same dtype) of an array without NaN,
    by a sort and a comparison of neighbours: ``np.unique``, ``np.union1d`` and
    ``np.median`` import ``numpy.ma`` at their first call in a process (7.4 ms holding
    the GIL), which the audit's serial path and threads avoid."""
    a = np.sort(np.asarray(a).ravel())
    return a[np.concatenate(([True], a[1:] != a[:-1]))] if len(a) else a
