"""kernels/products.py: the blocked cross-product kernel against numpy (property tests on invented
data: widths around the 4-column blocks, row counts around the row tiles, padded buffers)."""

from __future__ import annotations

import numpy as np
import pytest

from tallfit.kernels.products import TILE_ROWS, gram, shifted_sums


@pytest.mark.parametrize("q", [1, 2, 3, 4, 5, 7, 8, 22, 41])
@pytest.mark.parametrize("m", [0, 1, 5, TILE_ROWS, TILE_ROWS + 3, 3 * TILE_ROWS - 1])
def test_shifted_gram_equals_numpy(q, m):
    rng = np.random.default_rng(q * 1000 + m)
    A = np.asfortranarray(rng.normal(size=(m, q)) * rng.uniform(0.5, 50, q) + rng.normal(size=q) * 100)
    s = rng.normal(size=q) * 100
    D = A - s
    ref = D.T @ D
    P = gram(A, s)
    np.testing.assert_allclose(P, ref, rtol=1e-12, atol=1e-12 * max(1.0, np.abs(ref).max()))
    assert np.array_equal(P, P.T)
    out = np.ones((q, q))
    gram(A, s, out=out)  # adds to what is there
    np.testing.assert_allclose(out, ref + 1.0, rtol=1e-12, atol=1e-12 * max(1.0, np.abs(ref).max()))
    sums = np.zeros(q)
    shifted_sums(A, s, sums)
    np.testing.assert_allclose(sums, D.sum(axis=0), rtol=1e-12, atol=1e-12 * (np.abs(D).sum() + 1.0))


def test_padded_buffer_and_row_views_give_the_same_product():
    rng = np.random.default_rng(3)
    base = np.asfortranarray(rng.normal(size=(3000 + 64, 9)))
    A = base[:3000]  # the top of a padded pooled buffer: contiguous columns, a longer stride
    assert not A.flags.f_contiguous
    np.testing.assert_allclose(gram(A), np.asfortranarray(A).T @ np.asfortranarray(A), rtol=1e-12)
    np.testing.assert_array_equal(gram(A), gram(np.asfortranarray(A)))  # the same bits: see gram()


def test_shift_keeps_the_digits_a_large_mean_would_cancel():
    """Values near 1e9 with unit spread: products of the shifted values keep the spread's digits
    (the reference centres before multiplying, as numpy's np.cov does)."""
    rng = np.random.default_rng(5)
    A = np.asfortranarray(1e9 + rng.normal(size=(20000, 3)))
    s = A[:100].mean(axis=0)
    D = A - s
    np.testing.assert_allclose(gram(A, s), D.T @ D, rtol=1e-12)


@pytest.mark.parametrize("q", [1, 3, 4, 6, 21, 22])
def test_both_block_shapes_give_the_same_upper_triangle(q):
    """The 2 × 4 and the 4 × 4 column blocks (kernels.products picks one from the host's vector
    registers) sum each entry over the same rows: both equal numpy's product, whichever this
    machine uses."""
    from tallfit.kernels.products import upper_gram_rows_narrow, upper_gram_rows_wide

    rng = np.random.default_rng(40 + q)
    A = np.asfortranarray(rng.normal(size=(2 * TILE_ROWS + 17, q)))
    s = rng.normal(size=q)
    D = A[5:] - s
    ref = np.triu(D.T @ D)
    for kernel in (upper_gram_rows_narrow, upper_gram_rows_wide):
        U = np.zeros((q, q))
        kernel(A, 5, A.shape[0], s, U)
        np.testing.assert_allclose(U, ref, rtol=1e-12, atol=1e-12 * np.abs(ref).max())
        assert not np.tril(U, -1).any()  # only the upper triangle is summed
