"""kernels/lanes.add4: a four-lane table update equals four scalar updates, bit for bit (property
test on invented values: the reference is plain numpy addition in the same order)."""

from __future__ import annotations

import numba
import numpy as np
import pytest

from tallfit.kernels.lanes import add4


@numba.njit(cache=True)
def _scatter4(table, rows, values):
    for i in range(rows.shape[0]):
        add4(table, rows[i], values[i, 0], values[i, 1], values[i, 2], values[i, 3])


def test_add4_equals_scalar_adds_in_order():
    rng = np.random.default_rng(3)
    rows = rng.integers(0, 7, 5000).astype(np.int32)
    values = rng.standard_normal((5000, 4)) * 10.0 ** rng.integers(-8, 8, (5000, 1))
    table = np.zeros((7, 4))
    _scatter4(table, rows, values)
    ref = np.zeros((7, 4))
    for r, v in zip(rows, values):
        ref[r] += v  # same values, same order per lane
    np.testing.assert_array_equal(table, ref)


def test_add4_leaves_other_columns_and_rows_alone():
    table = np.arange(18.0).reshape(3, 6)
    before = table.copy()
    _scatter4(table, np.array([1], dtype=np.int64), np.array([[1.0, 2.0, 3.0, 4.0]]))
    before[1, :4] += [1.0, 2.0, 3.0, 4.0]
    np.testing.assert_array_equal(table, before)


def test_add4_refuses_a_non_contiguous_table():
    with pytest.raises(numba.core.errors.TypingError):
        _scatter4(np.zeros((4, 8))[:, ::2], np.zeros(1, dtype=np.int64), np.zeros((1, 4)))
