"""Tests for the double-double residual-products kernel (tallfit.kernels.compensated)."""

from __future__ import annotations

import math
from fractions import Fraction

import mpmath
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tallfit.kernels.compensated import (
    accumulate_residual_products,
    dd_add,
    dd_to_float,
    residual_products,
    residual_products_reference,
    split,
    two_product,
    two_sum,
)

U = 2.0**-53  # unit roundoff of float64

# --- strategies --------------------------------------------------------------------------


def _adversarial(min_exp: int, max_exp: int):
    """Doubles with extreme significands (1, 1+ulp, all ones, alternating bits) at any exponent."""
    mant = st.sampled_from([2**52, 2**52 + 1, 2**53 - 1, 0x15555555555555, 0x1AAAAAAAAAAAAA])
    mant = mant | st.integers(2**52, 2**53 - 1)
    return st.builds(
        lambda s, mt, e: s * math.ldexp(mt, e - 52),
        st.sampled_from([1.0, -1.0]),
        mant,
        st.integers(min_exp, max_exp),
    )


def _doubles(min_exp: int, max_exp: int):
    limit = 2.0**max_exp
    return (
        st.floats(-limit, limit, allow_nan=False, allow_infinity=False)
        | _adversarial(min_exp, max_exp - 1)
    )


# --- error-free transformations ----------------------------------------------------------


@settings(max_examples=400, deadline=None)
@given(_doubles(-1074, 1000), _doubles(-1074, 1000))
def test_two_sum_is_error_free(a, b):
    # Source: exact rational arithmetic (fractions.Fraction); TwoSum is Ogita-Rump-Oishi Alg. 3.1.
    s, e = two_sum(a, b)
    assert s == a + b
    assert Fraction(s) + Fraction(e) == Fraction(a) + Fraction(b)


def _significant_bits(v: float) -> int:
    n = abs(Fraction(v).numerator)
    return (n // (n & -n)).bit_length() if n else 0


@settings(max_examples=400, deadline=None)
@given(_doubles(-1000, 990))
def test_split_halves_are_exact_and_short(a):
    # Source: Dekker (1971) / Ogita-Rump-Oishi Alg. 3.2: a = hi + lo, each part fits in 26 bits.
    hi, lo = split(a)
    assert Fraction(hi) + Fraction(lo) == Fraction(a)
    assert _significant_bits(hi) <= 26 and _significant_bits(lo) <= 26


@settings(max_examples=400, deadline=None)
@given(_doubles(-450, 450), _doubles(-450, 450))
def test_two_product_is_error_free(a, b):
    # Source: exact rational arithmetic (fractions.Fraction); TwoProduct is ORO Alg. 3.3.
    # Exponents bounded so neither the product overflows nor its error term underflows.
    if a != 0 and b != 0 and abs(a * b) < 2.0**-900:
        return
    x, e = two_product(a, b)
    assert x == a * b
    assert Fraction(x) + Fraction(e) == Fraction(a) * Fraction(b)


@settings(max_examples=200, deadline=None)
@given(_adversarial(900, 990), _adversarial(-100, 20))
def test_two_product_near_split_limit(a, b):
    # Source: fractions.Fraction; large |a| up to 2**991, inside the split's overflow limit.
    x, e = two_product(a, b)
    assert Fraction(x) + Fraction(e) == Fraction(a) * Fraction(b)


@settings(max_examples=200, deadline=None)
@given(_doubles(-1000, 1000), _doubles(-1000, 1000))
def test_dd_to_float_rounds_correctly(hi, lo):
    # Source: float(Fraction) is correctly rounded (Python fractions documentation).
    assert dd_to_float(hi, lo) == float(Fraction(hi) + Fraction(lo))


# --- kernel against exact arithmetic -----------------------------------------------------


def _exact(X, y, b_hi, b_lo):
    """g = X^T r, ss = r^T r with r = y - X (b_hi + b_lo), in fractions.Fraction."""
    b = [Fraction(h) + Fraction(lo) for h, lo in zip(b_hi.tolist(), b_lo.tolist())]
    g = [Fraction(0)] * X.shape[1]
    ss = Fraction(0)
    for row, yi in zip(X.tolist(), y.tolist()):
        fr = [Fraction(v) for v in row]
        r = Fraction(yi) - sum(v * bv for v, bv in zip(fr, b))
        g = [gj + v * r for gj, v in zip(g, fr)]
        ss += r * r
    return g, ss


def _bounds(X, y, b):
    """A-priori bounds shaped like the Dot2 bound (ORO 2005, Sec. 5: gamma_n^2 ~ n^2 u^2)."""
    m, p = X.shape
    aX = np.abs(X)
    terms = np.abs(y) + aX @ np.abs(b)  # per-row size of the residual's summands
    c = 4.0 * ((p + 2) ** 2 + m**2) * U**2
    g_bound = c * (aX.T @ terms)
    ss_bound = c * float(terms @ terms)
    return g_bound, ss_bound


def _dd_err(hi, lo, exact: Fraction) -> float:
    return abs(float(Fraction(float(hi)) + Fraction(float(lo)) - exact))


def _random_problem(rng, m, p, *, noise):
    X = rng.standard_normal((m, p)) * np.exp2(rng.integers(-8, 8, size=p))
    b_hi = rng.standard_normal(p)
    b_lo = b_hi * U * rng.uniform(-1, 1, size=p)
    y = X @ b_hi + noise * rng.standard_normal(m) * (np.abs(X) @ np.abs(b_hi))
    return np.asfortranarray(X), y, b_hi, b_lo


def _check_against_exact(X, y, b_hi, b_lo):
    (g_hi, g_lo), (s_hi, s_lo) = residual_products(X, y, b_hi, b_lo)
    g_ex, ss_ex = _exact(X, y, b_hi, b_lo)
    g_bound, ss_bound = _bounds(X, y, b_hi)
    g_err = np.array([_dd_err(h, lo, ge) for h, lo, ge in zip(g_hi, g_lo, g_ex)])
    g_norm = max(abs(float(v)) for v in g_ex)
    assert np.all(g_err <= g_bound)
    assert g_err.max() <= 1e-15 * g_norm
    assert _dd_err(s_hi, s_lo, ss_ex) <= ss_bound
    assert _dd_err(s_hi, s_lo, ss_ex) <= 1e-15 * abs(float(ss_ex))
    return g_ex, g_norm


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_kernel_matches_exact_on_random_blocks(seed):
    # Source: exact rational arithmetic (fractions.Fraction), bounds after ORO (2005) Sec. 5.
    rng = np.random.default_rng(seed)
    X, y, b_hi, b_lo = _random_problem(rng, 40, 6, noise=0.3)
    _check_against_exact(X, y, b_hi, b_lo)


def test_kernel_keeps_digits_when_residuals_are_tiny():
    # Source: fractions.Fraction. y = X b up to 1e-12 relative, so y - X b cancels ~12 digits;
    # plain float64 X.T @ (y - X @ b) must lose them, the kernel must not.
    rng = np.random.default_rng(7)
    X, y, b_hi, b_lo = _random_problem(rng, 60, 5, noise=1e-12)
    g_ex, g_norm = _check_against_exact(X, y, b_hi, b_lo)
    naive = X.T @ (y - X @ (b_hi + b_lo))
    naive_err = max(abs(float(Fraction(float(v)) - ge)) for v, ge in zip(naive, g_ex))
    assert naive_err > 1e-8 * g_norm


def test_kernel_at_least_squares_solution():
    # Source: fractions.Fraction. At the float64 least-squares solution X^T r nearly vanishes,
    # the hardest case for the refinement step's right-hand side.
    rng = np.random.default_rng(11)
    X, y, _, _ = _random_problem(rng, 50, 4, noise=1e-6)
    b_hi = np.linalg.lstsq(X, y, rcond=None)[0]
    b_lo = np.zeros_like(b_hi)
    g_ex, g_norm = _check_against_exact(X, y, b_hi, b_lo)
    naive = X.T @ (y - X @ b_hi)
    naive_err = max(abs(float(Fraction(float(v)) - ge)) for v, ge in zip(naive, g_ex))
    assert naive_err > 1e-6 * g_norm


def test_reference_against_mpmath():
    # Source: mpmath at 60 significant digits.
    rng = np.random.default_rng(3)
    X, y, b_hi, b_lo = _random_problem(rng, 20, 4, noise=1e-10)
    (g_hi, g_lo), (s_hi, s_lo) = residual_products_reference(X, y, b_hi, b_lo)
    with mpmath.workdps(60):
        mpf = mpmath.mpf
        b = [mpf(h) + mpf(lo) for h, lo in zip(b_hi.tolist(), b_lo.tolist())]
        r = [mpf(yi) - mpmath.fsum(mpf(v) * bv for v, bv in zip(row, b))
             for row, yi in zip(X.tolist(), y.tolist())]
        g = [mpmath.fsum(mpf(X[i, j]) * r[i] for i in range(X.shape[0])) for j in range(X.shape[1])]
        ss = mpmath.fsum(ri * ri for ri in r)
        for h, lo, gj in zip(g_hi, g_lo, g):
            assert abs(mpf(h) + mpf(lo) - gj) <= 1e-30 * abs(gj)
        assert abs(mpf(s_hi) + mpf(s_lo) - ss) <= 1e-30 * ss


# --- streaming, layout, interface --------------------------------------------------------


def test_streaming_blocks_match_one_call():
    # Source: fractions.Fraction for the exact value both must approach.
    rng = np.random.default_rng(5)
    X, y, b_hi, b_lo = _random_problem(rng, 300, 7, noise=1e-9)
    (g1_hi, g1_lo), (s1_hi, s1_lo) = residual_products(X, y, b_hi, b_lo)
    g_hi, g_lo, ss = np.zeros(7), np.zeros(7), np.zeros(2)
    edges = [0, 0, 1, 37, 37, 150, 299, 300]  # includes empty and one-row blocks
    for a, b in zip(edges[:-1], edges[1:]):
        accumulate_residual_products(X[a:b], y[a:b], b_hi, b_lo, g_hi, g_lo, ss)
    g_bound, ss_bound = _bounds(X, y, b_hi)
    g_ex, ss_ex = _exact(X, y, b_hi, b_lo)
    for j in range(7):
        one = Fraction(g1_hi[j]) + Fraction(g1_lo[j])
        diff = abs(float(Fraction(g_hi[j]) + Fraction(g_lo[j]) - one))
        assert diff <= 2 * g_bound[j]
        assert _dd_err(g_hi[j], g_lo[j], g_ex[j]) <= g_bound[j]
    assert _dd_err(ss[0], ss[1], ss_ex) <= ss_bound
    assert abs(dd_to_float(ss[0], ss[1]) - dd_to_float(s1_hi, s1_lo)) <= 2 * ss_bound
    # the accumulators are left normalized: hi is the rounded double-double value
    assert np.array_equal(g_hi, dd_to_float(g_hi, g_lo)) and ss[0] == ss[0] + ss[1]


def test_c_and_f_order_and_strided_views_agree():
    rng = np.random.default_rng(9)
    X, y, b_hi, b_lo = _random_problem(rng, 200, 5, noise=1e-3)
    ref = residual_products(np.asfortranarray(X), y, b_hi, b_lo)
    for Xv in (np.ascontiguousarray(X), np.asfortranarray(np.repeat(X, 2, axis=0))[::2]):
        (gh, gl), ss = residual_products(Xv, y, b_hi, b_lo)
        assert np.array_equal(gh, ref[0][0]) and np.array_equal(gl, ref[0][1]) and ss == ref[1]


def test_missing_low_part_means_zero():
    rng = np.random.default_rng(4)
    X, y, b_hi, _ = _random_problem(rng, 30, 3, noise=0.1)
    (a_hi, a_lo), a_ss = residual_products(X, y, b_hi)
    (z_hi, z_lo), z_ss = residual_products(X, y, b_hi, np.zeros(3))
    assert np.array_equal(a_hi, z_hi) and np.array_equal(a_lo, z_lo) and a_ss == z_ss


def test_non_finite_input_propagates():
    X = np.ones((4, 2))
    X[2, 1] = np.nan
    (gh, _), ss = residual_products(X, np.ones(4), np.ones(2))
    assert np.isnan(gh).all() and math.isnan(ss[0])


def test_bad_arguments_are_rejected():
    X, y, b = np.ones((3, 2)), np.ones(3), np.ones(2)
    with pytest.raises(ValueError):
        residual_products(X, np.ones(4), b)
    with pytest.raises(ValueError):
        g32 = np.zeros(2, dtype=np.float32)
        accumulate_residual_products(X, y, b, b, g32, np.zeros(2), np.zeros(2))
    with pytest.raises(ValueError):
        accumulate_residual_products(X, y, b, b, np.zeros(2), np.zeros(2), np.zeros(3))
    with pytest.raises(TypeError):
        residual_products(X.astype(np.int64), y, b)


@settings(max_examples=300, deadline=None)
@given(_doubles(-900, 900), _doubles(-900, 900), _doubles(-900, 900), _doubles(-900, 900))
def test_dd_add_keeps_the_exact_sum_to_double_double_precision(a, b, c, d):
    """Two double-double values (each normalised first) add to within a few units of 2⁻¹⁰⁶ of the
    larger's magnitude, and come out normalised; the exact sum by fractions.Fraction."""
    a_hi, a_lo = two_sum(a, b * 2.0**-60)
    b_hi, b_lo = two_sum(c, d * 2.0**-60)
    hi, lo = dd_add(a_hi, a_lo, b_hi, b_lo)
    exact = Fraction(a_hi) + Fraction(a_lo) + Fraction(b_hi) + Fraction(b_lo)
    got = Fraction(float(hi)) + Fraction(float(lo))
    scale = max(abs(a_hi), abs(b_hi), 2.0**-900)
    assert abs(float(got - exact)) <= 4 * U * U * scale
    assert float(hi) == float(hi) + float(lo)  # normalised: hi is the rounded sum


def test_merging_parts_in_double_double_equals_one_stream():
    """The sums of two parts of the rows merged by dd_add (as the cluster's refinement pass does)
    agree with one stream over all the rows to double-double precision."""
    rng = np.random.default_rng(9)
    X, y, b_hi, b_lo = _random_problem(rng, 400, 5, noise=1e-9)
    (g_hi, g_lo), (s_hi, s_lo) = residual_products(X, y, b_hi, b_lo)
    (a_hi, a_lo), (sa_hi, sa_lo) = residual_products(X[:170], y[:170], b_hi, b_lo)
    (c_hi, c_lo), (sc_hi, sc_lo) = residual_products(X[170:], y[170:], b_hi, b_lo)
    m_hi, m_lo = dd_add(a_hi, a_lo, c_hi, c_lo)
    g_bound, ss_bound = _bounds(X, y, b_hi)
    for j in range(5):
        diff = abs(float(Fraction(m_hi[j]) + Fraction(m_lo[j]) - Fraction(g_hi[j]) - Fraction(g_lo[j])))
        assert diff <= 2 * g_bound[j]
    ms_hi, ms_lo = dd_add(sa_hi, sa_lo, sc_hi, sc_lo)
    assert abs(float(Fraction(float(ms_hi)) + Fraction(float(ms_lo)) - Fraction(s_hi) - Fraction(s_lo))) <= 2 * ss_bound
