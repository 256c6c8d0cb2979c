"""Many small factors at once: each row folded into its group's triangle by Givens rotations.

For per-group models a block's rows belong to many groups, each with a few rows; a Householder
fold per group and block then costs more in calls than in arithmetic (≈ 100 µs per group and
block against ≈ 1 µs of work). ``fold_rows_by_group`` walks the rows once: row x of group g is
rotated into R_g (k × k, upper triangular, one slice of a stack) column by column, the rotation
that zeroes x_j against R_g[j, j] applied to the rest of row j and of x. Orthogonal updates, so
R_gᵀR_g = Σ xxᵀ over the group's rows exactly up to rounding, and the update is backward stable
(Golub & Van Loan, Matrix Computations, 4th ed., §6.5.2, on updating a QR factorization by a row;
cited from memory). The diagonal stays non-negative. The same sweep keeps each group's column
minima, maxima and counts of non-zero entries (the rows per level of an indicator column).

``fold_rows_by_group_reference`` is the plain NumPy version used in tests.
"""

from __future__ import annotations

import numba
import numpy as np


@numba.njit(cache=True, nogil=True)
def fold_rows_by_group(R, A, codes, col_min, col_max, nonzero):  # pragma: no cover - compiled
    """For each row i with codes[i] = g ≥ 0: R[g] ← the triangle of [R[g]; A[i]], and the row's
    values into col_min[g], col_max[g] and nonzero[g] (rows with codes[i] < 0 are skipped)."""
    m, k = A.shape
    x = np.empty(k)
    for i in range(m):
        g = codes[i]
        if g < 0:
            continue
        for j in range(k):
            v = A[i, j]
            x[j] = v
            if v < col_min[g, j]:
                col_min[g, j] = v
            if v > col_max[g, j]:
                col_max[g, j] = v
            if v != 0.0:
                nonzero[g, j] += 1
        for j in range(k):
            b = x[j]
            if b == 0.0:
                continue
            a = R[g, j, j]
            r = np.sqrt(a * a + b * b)
            if not (r > 1e-150 and r < 1e150):  # near under- or overflow: the careful form
                r = np.hypot(a, b)
            c = a / r
            s = b / r
            R[g, j, j] = r
            for col in range(j + 1, k):
                t = R[g, j, col]
                u = x[col]
                R[g, j, col] = c * t + s * u
                x[col] = c * u - s * t


def fold_rows_by_group_reference(R: np.ndarray, A: np.ndarray, codes: np.ndarray) -> np.ndarray:
    """The stack of triangles by NumPy: R[g] ← triu(qr([R[g]; rows of g])), signs made non-negative."""
    out = R.copy()
    for g in np.unique(codes[codes >= 0]):
        T = np.linalg.qr(np.vstack([R[g], A[codes == g]]), mode="r")
        T = T * np.where(np.diag(T) < 0, -1.0, 1.0)[:, None]
        out[g] = np.triu(T)
    return out
