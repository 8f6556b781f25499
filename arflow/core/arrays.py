"""Small array helpers shared by the core."""

from __future__ import annotations

import numpy as np


def nan_to_num(x, copy: bool = True) -> np.ndarray:
    """``np.nan_to_num(x)`` as float64 (NaN -> 0, +-inf -> the largest finite values), identical results.

    The common case, everything finite, costs one check instead of numpy's three
    masked passes. ``copy=False`` may reuse ``x`` when it is already a float64 array.
    """
    out = np.array(x, dtype=np.float64, copy=True if copy else None)
    if out.ndim == 0:
        return np.nan_to_num(out)
    if not np.isfinite(out).all():
        np.nan_to_num(out, copy=False)
    return out
