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


def pattern_groups(mask: np.ndarray, limit: int) -> list[tuple[np.ndarray, np.ndarray]] | None:
    """Rows of a (G, K) boolean ``mask`` grouped by their pattern: ``[(rows, used columns)]``.

    Groups come in a fixed order (by the pattern's bits) and rows keep their
    order within a group. None when there are more than ``limit`` distinct
    patterns: then one whole-batch computation is cheaper than a call per group.

    >>> [(r.tolist(), c.tolist()) for r, c in pattern_groups(np.array([[1, 0], [1, 1], [1, 0]], bool), 4)]
    [([0, 2], [0]), ([1], [0, 1])]
    """
    key = np.packbits(mask, axis=1, bitorder="little")
    key = key.view(np.dtype((np.void, key.shape[1]))).ravel()
    uniq, inv = np.unique(key, return_inverse=True)
    if len(uniq) > limit:
        return None
    inv = inv.ravel()
    order = np.argsort(inv, kind="stable")
    bounds = np.searchsorted(inv[order], np.arange(len(uniq) + 1))
    groups = []
    for u in range(len(uniq)):
        rows = order[bounds[u]: bounds[u + 1]]
        groups.append((rows, np.flatnonzero(mask[rows[0]])))
    return groups
