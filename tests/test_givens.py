"""The per-group Givens fold (kernels/givens.py) against NumPy's QR of each group's stacked rows
(a reference outside the project), and its ranges and non-zero counts against direct numpy."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from tallfit.kernels.givens import fold_rows_by_group, fold_rows_by_group_reference


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), groups=st.integers(1, 6), k=st.integers(1, 7), m=st.integers(0, 80))
def test_each_group_gets_the_triangle_of_its_rows(seed, groups, k, m):
    rng = np.random.default_rng(seed)
    R0 = np.triu(rng.normal(size=(groups, k, k)))
    R0 *= np.where(np.einsum("gii->gi", R0) < 0, -1.0, 1.0)[:, :, None]  # non-negative diagonals
    A = np.asfortranarray(rng.normal(size=(m, k)) * rng.choice([0.0, 1.0, 1e3], size=(m, k)))
    codes = rng.integers(-1, groups, m).astype(np.int64)
    R = R0.copy()
    lo, hi = np.full((groups, k), np.inf), np.full((groups, k), -np.inf)
    nz = np.zeros((groups, k), dtype=np.int64)
    fold_rows_by_group(R, A, codes, lo, hi, nz)
    ref = fold_rows_by_group_reference(R0, A, codes)
    for g in range(groups):
        rows = A[codes == g]
        # R_gᵀR_g equals the Gram of the group's rows to rounding; the triangle itself equals the
        # reference's up to rows whose diagonal is zero (rank-deficient groups)
        gram = R0[g].T @ R0[g] + rows.T @ rows
        np.testing.assert_allclose(R[g].T @ R[g], gram, rtol=1e-10, atol=1e-9 * max(1.0, np.abs(gram).max()))
        full = np.abs(np.diag(ref[g])) > 1e-8 * max(1.0, np.abs(ref[g]).max())
        if full.all():
            np.testing.assert_allclose(R[g], ref[g], rtol=1e-9, atol=1e-9 * max(1.0, np.abs(ref[g]).max()))
        assert np.all(np.diag(R[g]) >= 0)
        if rows.shape[0]:
            np.testing.assert_array_equal(lo[g], rows.min(axis=0))
            np.testing.assert_array_equal(hi[g], rows.max(axis=0))
        np.testing.assert_array_equal(nz[g], np.count_nonzero(rows, axis=0))
