"""kernels/ranged_copy.py: a column's copy with its range and finiteness, against numpy (property
tests on invented data), and design blocks built with it against a direct computation."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest

from tallfit.design.numeric import design_block
from tallfit.design.spec import ModelSpec
from tallfit.kernels.ranged_copy import copy_with_range


@pytest.mark.parametrize("m", [0, 1, 7, 64, 1000, 65_537])
def test_copy_and_range_equal_numpy(m):
    rng = np.random.default_rng(m)
    x = rng.normal(size=m) * 1e6
    out = np.full(m, 7.0)
    lo, hi, finite = copy_with_range(x, x.view(np.int64), out)
    np.testing.assert_array_equal(out, x)
    assert finite
    if m:
        assert (lo, hi) == (x.min(), x.max())
    else:
        assert (lo, hi) == (np.inf, -np.inf)


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf, -np.nan])
@pytest.mark.parametrize("where", [0, 500, 999])
def test_any_nan_or_infinity_is_reported(bad, where):
    x = np.random.default_rng(2).normal(size=1000)
    x[where] = bad
    out = np.empty(1000)
    assert copy_with_range(x, x.view(np.int64), out)[2] is False
    np.testing.assert_array_equal(out, x)  # copied as is, NaN included


def test_largest_finite_values_and_subnormals_count_as_finite():
    x = np.array([np.finfo(float).max, -np.finfo(float).max, 5e-324, -5e-324, 0.0, -0.0])
    lo, hi, finite = copy_with_range(x, x.view(np.int64), np.empty(6))
    assert finite and lo == -np.finfo(float).max and hi == np.finfo(float).max


def test_design_block_ranges_and_dropped_rows_equal_a_direct_computation():
    rng = np.random.default_rng(9)
    m = 5000
    cols = {"a": rng.normal(size=m), "b": rng.uniform(-3, 9, m), "y": rng.normal(size=m)}
    cols["b"][[10, 4000]] = [np.nan, np.inf]
    cols["y"][77] = -np.inf
    batch = pa.record_batch({k: pa.array(v) for k, v in cols.items()})
    spec = ModelSpec(target="y", features=("a", "b"))
    block = design_block(batch, spec)
    ok = np.isfinite(cols["b"]) & np.isfinite(cols["y"])
    X = np.column_stack([np.ones(m), cols["a"], cols["b"], cols["y"]])[ok]
    np.testing.assert_array_equal(block.A, X)
    np.testing.assert_array_equal(block.keep, ok)
    assert block.dropped_by_column == {"b": 2, "y": 1}
    np.testing.assert_array_equal(block.col_min, X.min(axis=0))
    np.testing.assert_array_equal(block.col_max, X.max(axis=0))
    clean = design_block(pa.record_batch({k: pa.array(np.nan_to_num(v, posinf=0, neginf=0)) for k, v in cols.items()}), spec)
    assert clean.keep is None and clean.dropped_by_column == {}
    np.testing.assert_array_equal(clean.col_min, clean.A.min(axis=0))
    np.testing.assert_array_equal(clean.col_max, clean.A.max(axis=0))
