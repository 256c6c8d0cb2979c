"""Properties of the streamed factor: merging is associative and order-free, batch size does not
change the answer beyond rounding, and the factor agrees with in-memory references.

References: numpy.linalg.lstsq (LAPACK gelsd) for the coefficients; the defining identity
R'R = A'A of a QR factor; Demmel et al. (SIAM J. Sci. Comput. 34, 2012) for TSQR merging.
Data here are invented (property tests)."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
from hypothesis import given, settings
from hypothesis import strategies as st

import tallfit
from tallfit.accumulate.factor import FactorAccumulator
from tallfit.kernels.tsqr import fold_rows, normalize_signs, triangular_factor_reference
from tallfit.solve.exact import solve_exact


def _data(seed: int, n: int, p: int):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, p)) * rng.uniform(0.1, 100, size=p) + rng.normal(size=p) * 10
    y = X @ rng.normal(size=p) + rng.normal(size=n)
    A = np.column_stack([np.ones(n), X, y])
    return np.asfortranarray(A)


def _acc(A: np.ndarray) -> FactorAccumulator:
    acc = FactorAccumulator.create([f"c{i}" for i in range(A.shape[1])])
    acc.update(A)
    return acc


def _beta(acc: FactorAccumulator) -> np.ndarray:
    return solve_exact(acc.R, acc.names).beta


@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 10_000),
    n=st.integers(12, 300),
    p=st.integers(1, 6),
    cuts=st.lists(st.floats(0, 1), min_size=2, max_size=2),
)
def test_merge_is_associative_and_order_free(seed, n, p, cuts):
    A = _data(seed, n, p)
    i, j = sorted(int(c * n) for c in cuts)
    a, b, c = _acc(A[:i]), _acc(A[i:j]), _acc(A[j:])
    whole = _beta(_acc(A))
    left = (a.merge(b)).merge(c)
    right = a.merge(b.merge(c))
    swapped = c.merge(a).merge(b)
    ref = np.linalg.lstsq(A[:, :-1], A[:, -1], rcond=None)[0]
    for m in (left, right, swapped):
        assert m.n_used == n
        np.testing.assert_allclose(_beta(m), whole, rtol=1e-9, atol=1e-9 * np.abs(whole).max())
        np.testing.assert_allclose(_beta(m), ref, rtol=1e-8, atol=1e-8 * np.abs(ref).max())
        # R'R = A'A, the defining identity
        G = A.T @ A
        np.testing.assert_allclose(m.R.T @ m.R, G, rtol=1e-10, atol=1e-10 * np.abs(G).max())


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 10_000), tile=st.integers(1, 50))
def test_tiling_equals_in_memory_qr(seed, tile):
    A = _data(seed, 120, 4)
    R = normalize_signs(fold_rows(np.zeros((6, 6)), A, tile_rows=tile))
    np.testing.assert_allclose(R, triangular_factor_reference(A), rtol=1e-10, atol=1e-10 * np.abs(A).max())


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 10_000), batch=st.integers(1, 97))
def test_batch_size_does_not_change_the_fit(seed, batch):
    A = _data(seed, 200, 3)
    table = pa.table({"x1": A[:, 1], "x2": A[:, 2], "x3": A[:, 3], "y": A[:, 4]})
    base = tallfit.fit(table, "y", ["x1", "x2", "x3"], batch_rows=200)
    other = tallfit.fit(table, "y", ["x1", "x2", "x3"], batch_rows=batch)
    b = base.inference.estimate
    np.testing.assert_allclose(other.inference.estimate, b, rtol=1e-10, atol=1e-10 * np.abs(b).max())
    np.testing.assert_allclose(other.inference.std_error, base.inference.std_error, rtol=1e-9)
    assert other.inference.n_used == 200


@settings(max_examples=20, deadline=None)
@given(seed=st.integers(0, 10_000))
def test_predictions_equal_x_beta(seed):
    A = _data(seed, 150, 3)
    table = pa.table({"x1": A[:, 1], "x2": A[:, 2], "x3": A[:, 3], "y": A[:, 4]})
    model = tallfit.fit(table, "y", ["x1", "x2", "x3"], batch_rows=40)
    pred = tallfit.predict(model, table, batch_rows=33)["prediction"].to_numpy()
    np.testing.assert_allclose(pred, A[:, :4] @ model.inference.estimate, rtol=1e-12, atol=1e-9)


def test_accumulator_state_round_trips_exactly():
    A = _data(3, 100, 4)
    acc = _acc(A)
    back = FactorAccumulator.from_state(acc.to_state())
    np.testing.assert_array_equal(back.R, acc.canonical_R())
    assert back.n_used == acc.n_used and back.names == acc.names


def test_extra_columns_follow_the_used_rows():
    from tallfit.design.spec import ModelSpec
    from tallfit.engine.local import design_blocks
    from tallfit.inputs import as_source

    x = np.array([1.0, np.nan, 3.0, 4.0, 5.0])
    table = pa.table({"x": x, "y": x * 2, "host": ["a", "b", "c", "d", "e"]})
    blocks = list(design_blocks(as_source(table), ModelSpec("y", ("x",)), batch_rows=2, extra_columns=["host"]))
    hosts = [h for b in blocks for h in b.extra["host"].to_pylist()]
    assert hosts == ["a", "c", "d", "e"]
    assert sum(b.n_used for b in blocks) == 4
    assert [b.row_start for b in blocks] == [0, 2, 4]
