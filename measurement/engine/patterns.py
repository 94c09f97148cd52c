"""Missing-data patterns: rows grouped by which items they answered.

:func:`row_patterns` gives what ``np.unique(observed, axis=0, return_inverse=True)`` gives
(the distinct rows in the same sorted order, and each row's pattern number), from one sort
of packed integer keys instead of numpy's row-wise comparison, which at a million rows of 60
items took seconds per call.
"""

from __future__ import annotations

import numpy as np


def row_patterns(observed: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The distinct rows of a boolean matrix, sorted (False before True, column by column),
    and for each row the index of its pattern among them."""
    obs = np.asarray(observed, dtype=bool)
    n = obs.shape[0]
    if n == 0 or obs.ndim != 2 or obs.shape[1] == 0:
        pats, inv = np.unique(obs, axis=0, return_inverse=True)
        return pats, np.asarray(inv).reshape(-1)
    if obs.all() or not obs.any():
        return obs[:1].copy(), np.zeros(n, dtype=np.intp)
    # the first column in the highest bit: keys sort as rows do
    return packed_patterns(np.packbits(obs, axis=1), obs.shape[1])


def packed_patterns(packed: np.ndarray, columns: int) -> tuple[np.ndarray, np.ndarray]:
    """:func:`row_patterns` of rows already packed (``np.packbits(observed, axis=1)`` of a
    matrix with ``columns`` columns), so a caller reading rows a block at a time keeps
    ``columns / 8`` bytes per row rather than the boolean matrix."""
    n, width = packed.shape
    if width <= 8:
        wide = np.ascontiguousarray(packed)
        if width < 8:
            wide = np.zeros((n, 8), dtype=np.uint8)
            wide[:, :width] = packed
        keys = wide.view(">u8").ravel()
    else:
        keys = np.ascontiguousarray(packed).view(np.dtype((np.void, width))).ravel()
    _, first, inverse = np.unique(keys, return_index=True, return_inverse=True)
    patterns = np.unpackbits(packed[first], axis=1, count=columns).astype(bool)
    return patterns, np.asarray(inverse, dtype=np.intp).reshape(-1)


def rows_by_pattern(inverse: np.ndarray, count: int) -> list[np.ndarray]:
    """For each pattern number below ``count``, the rows that have it (ascending), from one
    stable sort rather than one pass over every row per pattern."""
    inverse = np.asarray(inverse).reshape(-1)
    order = np.argsort(inverse, kind="stable")
    bounds = np.cumsum(np.bincount(inverse, minlength=count))[:-1]
    return np.split(order, bounds)
