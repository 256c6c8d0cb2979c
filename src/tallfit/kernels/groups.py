"""Per-group sums and centring for absorbed keys (numba), beside a plain NumPy reference.

With a key of 10^5 levels most groups in a batch hold one or two rows, where NumPy's grouped
reductions (reduceat, fancy-indexed updates) spend their time on per-group overhead; these
loops touch each value once.
"""

from __future__ import annotations

import numba
import numpy as np


@numba.njit(cache=True, nogil=True)
def group_means(A, inv, n_groups):
    """Row counts and column means of A (m × k) per group id inv[i] in [0, n_groups)."""
    m, k = A.shape
    counts = np.zeros(n_groups)
    for i in range(m):
        counts[inv[i]] += 1.0
    means = np.zeros((k, n_groups)).T  # Fortran order: each column's group sums stay in cache
    for j in range(k):
        for i in range(m):
            means[inv[i], j] += A[i, j]
    for j in range(k):
        for g in range(n_groups):
            means[g, j] /= counts[g]
    return counts, means


@numba.njit(cache=True, nogil=True)
def centre_rows(A, means, inv):
    """A copy of A (Fortran order) with each row minus its group's mean."""
    m, k = A.shape
    out = np.empty((k, m)).T  # Fortran-order m × k
    for j in range(k):
        for i in range(m):
            out[i, j] = A[i, j] - means[inv[i], j]
    return out


@numba.njit(cache=True, nogil=True)
def merge_means(means, counts, present, batch_means, batch_counts):
    """Running means and counts of the groups `present` updated with a batch's (in place)."""
    k = means.shape[1]
    for j in range(k):  # column by column: both means arrays are Fortran order
        for p in range(present.shape[0]):
            g = present[p]
            w = batch_counts[p] / (counts[g] + batch_counts[p])
            means[g, j] += (batch_means[p, j] - means[g, j]) * w
    for p in range(present.shape[0]):
        counts[present[p]] += batch_counts[p]


def group_means_reference(A: np.ndarray, inv: np.ndarray, n_groups: int):
    counts = np.bincount(inv, minlength=n_groups).astype(np.float64)
    sums = np.zeros((n_groups, A.shape[1]))
    np.add.at(sums, inv, A)
    return counts, sums / counts[:, None]
