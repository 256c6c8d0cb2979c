"""Mini-batch SGD: the numba kernel against its numpy reference, averaged SGD's accuracy,
divergence, reproducibility.

References: the plain-numpy reference implementation in tallfit.kernels.sgd (step for step);
numpy.linalg.lstsq (LAPACK) for the optimum; Polyak & Juditsky (1992) for averaging reaching the
noise level of the optimum within a few epochs on well-conditioned data (property test).
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest

import tallfit
from tallfit.errors import NumericalError
from tallfit.kernels.sgd import (
    CONSTANT,
    INVERSE,
    gradient_products,
    gradient_products_reference,
    sgd_block,
    sgd_block_reference,
)
from tallfit.solve.iterative.sgd import shuffled_order


@pytest.mark.parametrize("schedule,momentum,l2,averaging", [(CONSTANT, 0.0, 0.0, True), (INVERSE, 0.7, 0.05, True),
                                                            (CONSTANT, 0.9, 0.0, False)])
def test_kernel_equals_numpy_reference_step_for_step(schedule, momentum, l2, averaging):
    rng = np.random.default_rng(11)
    m, p, bs = 53, 4, 8
    X = np.asfortranarray(rng.normal(size=(m, p)) * [1, 2, 3, 4] + [1, 0, -1, 2])
    X[:, 0] = 1.0
    y = rng.normal(size=m)
    order = rng.permutation(m)
    shift, inv = np.array([0.0, 0.1, -0.9, 2.1]), np.array([1.0, 0.5, 0.33, 0.25])
    mask = np.array([0.0, 1, 1, 1])
    runs = []
    for fn in (sgd_block, sgd_block_reference):
        c, v, cbar, state = np.zeros(p), np.zeros(p), np.zeros(p), np.zeros(4)
        trace = np.zeros((7, p))
        for _ in range(2):  # two calls: state carries over
            fn(X, y, order, shift, inv, c, v, cbar, state, bs, 0.05, schedule, 0.3, 0.5, momentum, l2, mask,
               averaging, trace)
        runs.append((c, cbar, state, trace))
    for a, b in zip(*runs):
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-15)
    assert runs[0][2][0] == 2 * 7  # ceil(53 / 8) steps per call


@pytest.mark.parametrize("m,k", [(1, 1), (2047, 1), (5000, 2), (4099, 3)])
def test_gradient_products_equal_numpy(m, k):
    rng = np.random.default_rng(m)  # invented block; reference: numpy (BLAS) matrix products
    A = np.asfortranarray(rng.normal(size=(m, 6)))
    W = np.asfortranarray(rng.normal(size=(5, k)))
    G, ss = np.zeros((5, k)), np.zeros(k)
    G2, ss2 = np.ones((5, k)), np.ones(k)
    G += 1.0
    ss += 1.0
    gradient_products(A[:, :5], A[:, 5], W, G, ss)
    gradient_products_reference(A[:, :5], A[:, 5], W, G2, ss2)
    np.testing.assert_allclose(G, G2, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(ss, ss2, rtol=1e-12)


def test_shuffled_order_is_a_permutation():
    rng = np.random.default_rng(0)
    for m in (5, 1024, 5000):
        for mode in ("window", "rows"):
            o = shuffled_order(m, rng, mode)
            assert np.array_equal(np.sort(o), np.arange(m))


def test_window_shuffle_keeps_windows_together_and_mixes_them():
    o = shuffled_order(5000, np.random.default_rng(1), "window", window=1000)
    windows = o.reshape(5, 1000) // 1000
    assert all((w == w[0]).all() for w in windows)  # each run of 1000 rows is one window
    assert sorted(windows[:, 0]) == list(range(5)) and list(windows[:, 0]) != list(range(5))
    assert not np.array_equal(o[:1000], np.sort(o[:1000]))  # rows shuffled within
    again = shuffled_order(5000, np.random.default_rng(1), "window", window=1000)
    assert np.array_equal(o, again)  # seeded: reproducible


@pytest.fixture(scope="module")
def well_conditioned():
    rng = np.random.default_rng(5)  # invented data, property test
    n = 20000
    X = rng.normal(size=(n, 4)) * [1, 20, 0.5, 3] + [0, 100, 2, -5]
    y = 7 + X @ [0.5, -0.1, 4.0, 1.5] + rng.normal(size=n)
    table = pa.table({"a": X[:, 0], "b": X[:, 1], "c": X[:, 2], "d": X[:, 3], "y": y})
    Xi = np.column_stack([np.ones(n), X])
    return table, Xi, y


def test_averaged_sgd_reaches_1e3_in_a_few_epochs(well_conditioned):
    table, X, y = well_conditioned
    model = tallfit.fit(table, "y", list("abcd"), solver="sgd", solver_options={"epochs": 3}, batch_rows=4096)
    ref = np.linalg.lstsq(X, y, rcond=None)[0]  # reference: LAPACK least squares
    b = model.inference.estimate
    d = X @ (b - ref)
    gap = float(d @ d) / float(np.sum((X @ ref - y) ** 2))
    assert gap < 1e-3
    np.testing.assert_allclose(gap, model.iterations["final_relative_gap"], rtol=1e-6)
    np.testing.assert_allclose(b, ref, rtol=0.05)


def test_sgd_is_reproducible_with_a_seed(well_conditioned):
    table, _, _ = well_conditioned
    opts = {"epochs": 2, "seed": 4, "momentum": 0.5, "schedule": "inverse", "batch_size": 64}
    a = tallfit.fit(table, "y", list("abcd"), solver="sgd", solver_options=opts).inference.estimate
    b = tallfit.fit(table, "y", list("abcd"), solver="sgd", solver_options=opts).inference.estimate
    c = tallfit.fit(table, "y", list("abcd"), solver="sgd", solver_options={**opts, "seed": 5}).inference.estimate
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c)


def test_sgd_over_large_step_is_reported(well_conditioned):
    table, _, _ = well_conditioned
    with pytest.raises(NumericalError, match=r"SGD diverged.*learning rate was 50.*lower it"):
        tallfit.fit(table, "y", list("abcd"), solver="sgd", solver_options={"learning_rate": 50.0})


def test_sgd_bad_options_are_clear_errors(well_conditioned):
    table, _, _ = well_conditioned
    with pytest.raises(tallfit.TallfitError, match="schedule must be one of"):
        tallfit.fit(table, "y", list("abcd"), solver="sgd", solver_options={"schedule": "cosine"})
    with pytest.raises(tallfit.TallfitError, match="momentum must be in"):
        tallfit.fit(table, "y", list("abcd"), solver="sgd", solver_options={"momentum": 1.5})
