"""Double-double residual products for the iterative-refinement pass.

For one row block it forms ``r = y - X b`` and accumulates ``g += X^T r`` and
``ss += r^T r``, all in double-double (an unevaluated sum ``hi + lo`` of two float64).

The method uses error-free transformations and compensated dot products, after
T. Ogita, S. M. Rump and S. Oishi, "Accurate sum and dot product", SIAM J. Sci. Comput.
26 (2005) 1955-1988: Algorithm 3.1 (TwoSum, Knuth), Algorithm 3.3 (TwoProduct, Dekker,
with Veltkamp's split, Algorithm 3.2) and Dot2 (Section 5). Numba's nopython mode offers
no fused multiply-add on Python < 3.13 (there is no ``math.fma``), so TwoProduct uses the
FMA-free split. It is exact when nothing overflows (|a| < 2**995) and the error term does
not underflow. The residuals feed iterative refinement with the semi-normal equations
``R^T R d = X^T r``, see A. Björck, Numerical Methods for Least Squares Problems
(SIAM, 1996).

Accuracy: each residual ``r_i = r_hi + r_lo`` is a Dot2 sum left unrounded, so its error is
about ``(p+1)**2 u**2 (|y_i| + sum_j |X_ij b_j|)`` (u = 2**-53). The products
``X_ij * r_i`` use both parts of ``r_i`` and are summed with TwoSum, which adds about
``m**2 u**2 sum_i |X_ij r_i|`` to ``g_j``.
Non-finite inputs give non-finite outputs.
"""

from __future__ import annotations

from fractions import Fraction

import numba
import numpy as np

__all__ = [
    "two_sum",
    "split",
    "two_product",
    "two_product_split",
    "accumulate_residual_products",
    "residual_products",
    "residual_products_reference",
    "dd_to_float",
]

_SPLITTER = 134217729.0  # 2**27 + 1 (Veltkamp)


@numba.njit(cache=True, nogil=True)
def two_sum(a, b):
    """Return ``(s, e)`` with ``s = fl(a + b)`` and ``s + e == a + b`` exactly (Knuth)."""
    s = a + b
    z = s - a
    e = (a - (s - z)) + (b - z)
    return s, e


@numba.njit(cache=True, nogil=True)
def split(a):
    """Veltkamp split: ``a == hi + lo`` exactly, each part with at most 26 significant bits."""
    c = _SPLITTER * a
    hi = c - (c - a)
    return hi, a - hi


@numba.njit(cache=True, nogil=True)
def two_product_split(a, ah, al, b, bh, bl):
    """TwoProduct of pre-split factors: ``(ah, al) = split(a)``, ``(bh, bl) = split(b)``."""
    x = a * b
    return x, al * bl - (((x - ah * bh) - al * bh) - ah * bl)


@numba.njit(cache=True, nogil=True)
def two_product(a, b):
    """Return ``(x, e)`` with ``x = fl(a * b)`` and ``x + e == a * b`` exactly (Dekker)."""
    ah, al = split(a)
    bh, bl = split(b)
    return two_product_split(a, ah, al, b, bh, bl)


@numba.njit(cache=True, nogil=True)
def _accumulate(X, y, b_hi, b_lo, g_hi, g_lo, ss):
    m, p = X.shape
    # Per-call work arrays; nothing is allocated per row.
    bh = np.empty(p)
    bl = np.empty(p)
    gh = np.empty(p)
    gl = np.empty(p)
    for j in range(p):
        bh[j], bl[j] = split(b_hi[j])
        gh[j] = g_hi[j]
        gl[j] = g_lo[j]
    s_hi = ss[0]
    s_lo = ss[1]
    for i in range(m):
        # r_i = y_i - sum_j X_ij (b_hi_j + b_lo_j) by Dot2, its error terms kept in k.
        s = y[i]
        k = 0.0
        for j in range(p):
            x = X[i, j]
            xh, xl = split(x)
            q, e = two_product_split(x, xh, xl, b_hi[j], bh[j], bl[j])
            s, d = two_sum(s, -q)
            k += d - e - x * b_lo[j]
        r_hi, r_lo = two_sum(s, k)
        rh, rl = split(r_hi)
        # g_j += X_ij (r_hi + r_lo): TwoProduct on r_hi, plain product on r_lo, TwoSum.
        for j in range(p):
            x = X[i, j]
            xh, xl = split(x)
            q, e = two_product_split(x, xh, xl, r_hi, rh, rl)
            gh[j], d = two_sum(gh[j], q)
            gl[j] += d + (e + x * r_lo)
        # ss += r^2 = r_hi^2 + 2 r_hi r_lo (+ r_lo^2, below double-double precision).
        q, e = two_product_split(r_hi, rh, rl, r_hi, rh, rl)
        s_hi, d = two_sum(s_hi, q)
        s_lo += d + (e + 2.0 * r_hi * r_lo)
    for j in range(p):
        g_hi[j], g_lo[j] = two_sum(gh[j], gl[j])
    ss[0], ss[1] = two_sum(s_hi, s_lo)


def _as_float64(a, name: str, ndim: int) -> np.ndarray:
    a = np.asarray(a)
    if a.dtype != np.float64:
        exact = (a.dtype.kind == "f" and a.dtype.itemsize < 8) or (
            a.dtype.kind in "iub" and a.dtype.itemsize <= 4
        )
        if not exact:
            raise TypeError(f"{name}: expected float64 values, got dtype {a.dtype}")
        a = a.astype(np.float64)
    if a.ndim != ndim:
        raise ValueError(f"{name}: expected a {ndim}-d array, got shape {a.shape}")
    return a


def _check_out(a, name: str, n: int) -> None:
    ok = (
        isinstance(a, np.ndarray)
        and a.dtype == np.float64
        and a.shape == (n,)
        and a.flags.c_contiguous
        and a.flags.writeable
    )
    if not ok:
        raise ValueError(f"{name}: expected a writable contiguous float64 array of shape ({n},)")


def accumulate_residual_products(X, y, b_hi, b_lo, g_hi, g_lo, ss) -> None:
    """Add one batch: ``g += X^T r`` and ``ss += r^T r`` with ``r = y - X (b_hi + b_lo)``.

    ``g_hi``/``g_lo`` (length p) and ``ss`` (``[hi, lo]``) are double-double accumulators,
    updated in place and left normalized. ``X`` is (m, p), C- or F-ordered.
    """
    X = _as_float64(X, "X", 2)
    if not (X.flags.c_contiguous or X.flags.f_contiguous):
        X = np.asfortranarray(X)
    m, p = X.shape
    y = np.ascontiguousarray(_as_float64(y, "y", 1))
    b_hi = np.ascontiguousarray(_as_float64(b_hi, "b_hi", 1))
    b_lo = np.ascontiguousarray(_as_float64(b_lo, "b_lo", 1))
    if y.shape != (m,):
        raise ValueError(f"y: expected shape ({m},), got {y.shape}")
    for name, b in (("b_hi", b_hi), ("b_lo", b_lo)):
        if b.shape != (p,):
            raise ValueError(f"{name}: expected shape ({p},), got {b.shape}")
    _check_out(g_hi, "g_hi", p)
    _check_out(g_lo, "g_lo", p)
    _check_out(ss, "ss", 2)
    _accumulate(X, y, b_hi, b_lo, g_hi, g_lo, ss)


def residual_products(X, y, b_hi, b_lo=None):
    """Return ``((g_hi, g_lo), (ss_hi, ss_lo))`` for one block: ``g = X^T r``, ``ss = r^T r``."""
    p = np.shape(X)[1]
    if b_lo is None:
        b_lo = np.zeros(p)
    g_hi = np.zeros(p)
    g_lo = np.zeros(p)
    ss = np.zeros(2)
    accumulate_residual_products(X, y, b_hi, b_lo, g_hi, g_lo, ss)
    return (g_hi, g_lo), (float(ss[0]), float(ss[1]))


def dd_add(a_hi, a_lo, b_hi, b_lo) -> tuple[np.ndarray, np.ndarray]:
    """(a_hi + a_lo) + (b_hi + b_lo) in double-double, elementwise (TwoSum of the high parts, the
    low parts and its error added, then renormalised): how the sums of two parts of the data merge."""
    a_hi, a_lo, b_hi, b_lo = (np.asarray(v, dtype=np.float64) for v in (a_hi, a_lo, b_hi, b_lo))
    s = a_hi + b_hi
    bb = s - a_hi
    err = (a_hi - (s - bb)) + (b_hi - bb)
    lo = err + (a_lo + b_lo)
    hi = s + lo
    return hi, lo - (hi - s)


def dd_to_float(hi, lo):
    """Round a double-double (scalars or arrays) to the nearest float64: ``fl(hi + lo)``."""
    return np.add(hi, lo)


def _fraction_to_dd(v: Fraction) -> tuple[float, float]:
    hi = float(v)
    return hi, float(v - Fraction(hi))


def residual_products_reference(X, y, b_hi, b_lo=None):
    """Exact rational version of :func:`residual_products`, rounded to double-double at the end.

    Pure Python with :class:`fractions.Fraction`; for tests on small blocks only.
    """
    X = np.asarray(X, dtype=np.float64)
    m, p = X.shape
    b_lo = np.zeros(p) if b_lo is None else np.asarray(b_lo, dtype=np.float64)
    b = [Fraction(float(h)) + Fraction(float(lo)) for h, lo in zip(b_hi, b_lo)]
    g = [Fraction(0)] * p
    ss = Fraction(0)
    for i in range(m):
        row = [Fraction(float(v)) for v in X[i]]
        r = Fraction(float(y[i])) - sum((xv * bv for xv, bv in zip(row, b)), Fraction(0))
        g = [gj + xv * r for gj, xv in zip(g, row)]
        ss += r * r
    pairs = [_fraction_to_dd(v) for v in g]
    g_hi = np.array([h for h, _ in pairs], dtype=np.float64)
    g_lo = np.array([lo for _, lo in pairs], dtype=np.float64)
    return (g_hi, g_lo), _fraction_to_dd(ss)
