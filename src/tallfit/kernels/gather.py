"""Rows of a Fortran-order matrix routed to their groups (folds, holdout) in one GIL-free sweep.

A stable counting sort by group, the copy, then each group's column ranges over its rows: numpy's
argsort + ``take`` per column + a min/max per group measured about three times the cost and held
the interpreter while it worked.
"""

from __future__ import annotations

import numba
import numpy as np


@numba.njit(cache=True, nogil=True, boundscheck=False)
def _route(A, groups, n_groups, out, starts, lo, hi):  # pragma: no cover - compiled
    m, k = A.shape
    counts = np.zeros(n_groups + 1, dtype=np.int64)
    for i in range(m):
        counts[groups[i] + 1] += 1
    for g in range(n_groups):
        counts[g + 1] += counts[g]
    starts[:] = counts
    dest = np.empty(m, dtype=np.int64)
    for i in range(m):  # a stable counting sort: rows keep their order within a group
        g = groups[i]
        dest[i] = counts[g]
        counts[g] += 1
    for j in range(k):  # the copy, then each group's range over its now contiguous rows (keeping
        # every group's minimum in memory while rows of any group come chains a store to the next
        # load: 21.7 against 12.1 ms for a 65,536 × 64 block in 11 groups)
        a = A[:, j]
        o = out[:, j]
        for i in range(m):
            o[dest[i]] = a[i]
        for g in range(n_groups):
            lo_g = np.inf
            hi_g = -np.inf
            for i in range(starts[g], starts[g + 1]):
                v = o[i]
                lo_g = min(lo_g, v)
                hi_g = max(hi_g, v)
            lo[g, j] = lo_g
            hi[g, j] = hi_g


def route_rows(A: np.ndarray, groups: np.ndarray, n_groups: int):
    """The rows of A sorted by group (stable), the start of each group's rows (n_groups + 1
    offsets) and each group's column minima and maxima (n_groups × k), in one sweep."""
    groups = np.ascontiguousarray(groups, dtype=np.int64)
    if groups.size and (groups.min() < 0 or groups.max() >= n_groups):
        raise IndexError(f"group number out of range for {n_groups} groups")
    m, k = A.shape
    out = np.empty((m, k), dtype=np.float64, order="F")
    starts = np.empty(n_groups + 1, dtype=np.int64)
    lo, hi = np.empty((n_groups, k)), np.empty((n_groups, k))
    _route(np.asarray(A, dtype=np.float64), groups, n_groups, out, starts, lo, hi)
    return out, starts, lo, hi
