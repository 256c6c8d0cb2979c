"""Kernels of the second pass, each beside a plain-numpy reference used in tests.

* ``design_residuals``: copies the model's columns of a row tile into a Fortran-order buffer (for
  the in-place triangular product) and computes fitted values and residuals on the way.
* ``times_upper``: X ← X T for an upper triangle T by BLAS dtrmm, called without the GIL (scipy's
  wrapper keeps it, which serialised the workers).
* ``scores_and_leverage``: from a tile of Z = X R11⁻¹ and e: leverages h = ‖zᵢ‖², the scores
  w = e·z and d·w (d = h/(1 − h), for HC2/HC3), Σ w and the Breusch–Pagan sums Σ z e².
* ``grid_bin_sums`` (``grid_bin_sums_rows`` for a range of rows): per chosen column of a block,
  the cell of every row on a uniform grid and, per cell, the row count, Σx, Σe and Σe² (a multiply
  and a store per value: measured ≈ 2.5 ns per value here, against ≈ 13 ns for sample-quantile
  edges found through a lookup table and ≈ 30 ns by binary search, whose branches mispredict).
* ``square_moments``: mean and centred sum of squares of e² (one block, two sweeps).
* ``grid_index``: the grid cell of each value of one column (fitted values, residuals).
* ``scatter_rows``: S[code[i], :] += W[i, :] (cluster score sums).
* ``grid_counts``: a 2-D histogram of two cell indices (fitted value × residual).
* ``residual_moments``: Σ|e|, Σe², Σe³, Σe⁴, min, max and a histogram on a fixed grid.

The pass runs the first four on row tiles that stay in the core's cache between steps (each step
is bound by memory traffic when it sweeps a whole 10 MB block).

A grid is (lo, scale, cells): cell 0 holds x < lo, cell k (1 ≤ k ≤ cells) holds
lo + (k−1)/scale ≤ x < lo + k/scale, and cell cells + 1 everything above, so no row is lost.
"""

from __future__ import annotations

import ctypes
from functools import lru_cache

import numba
import numpy as np


@numba.njit(cache=True, nogil=True, inline="always")
def _cell(x, lo, scale, cells):
    t = (x - lo) * scale
    if t < 0.0:
        return 0
    k = int(t) + 1
    return k if k <= cells else cells + 1


@numba.njit(cache=True, nogil=True)
def grid_bin_sums_rows(A, r0, r1, cols, e, lo, scale, cells, out, lo_seen, hi_seen, kbuf):
    """out[j, k] += (1, x, e, e²) over rows r0..r1-1 of column cols[j] of A in grid cell k (e and
    kbuf indexed by the same rows); lo_seen / hi_seen track the range."""
    for j in range(cols.shape[0]):
        a = A[:, cols[j]]
        lj = lo[j]
        sj = scale[j]
        mn = lo_seen[j]
        mx = hi_seen[j]
        for i in range(r0, r1):  # indices first, then the scatter: two simple loops run faster
            x = a[i]
            kbuf[i] = _cell(x, lj, sj, cells)
            mn = min(mn, x)
            mx = max(mx, x)
        lo_seen[j] = mn
        hi_seen[j] = mx
        o = out[j]  # one column's cells (33 KB at 1024 cells)
        for i in range(r0, r1):
            k = kbuf[i]
            r = e[i]
            o[k, 0] += 1.0
            o[k, 1] += a[i]
            o[k, 2] += r
            o[k, 3] += r * r


@numba.njit(cache=True, nogil=True)
def grid_bin_sums(A, cols, e, lo, scale, cells, out, lo_seen, hi_seen, kbuf):
    """``grid_bin_sums_rows`` over every row of A."""
    grid_bin_sums_rows(A, 0, A.shape[0], cols, e, lo, scale, cells, out, lo_seen, hi_seen, kbuf)


@numba.njit(cache=True, nogil=True)
def grid_index(x, lo, scale, cells, out):
    """out[i] = the grid cell of x[i]."""
    for i in range(x.shape[0]):
        out[i] = _cell(x[i], lo, scale, cells)


@numba.njit(cache=True, nogil=True)
def scatter_rows(codes, W, S):
    """S[codes[i], :] += W[i, :]."""
    m, p = W.shape
    for j in range(p):
        for i in range(m):
            S[codes[i], j] += W[i, j]


@numba.njit(cache=True, nogil=True)
def grid_counts(a, b, counts):
    """counts[a[i], b[i]] += 1 (a 2-D histogram from two cell indices)."""
    for i in range(a.shape[0]):
        counts[a[i], b[i]] += 1


@numba.njit(cache=True, nogil=True)
def residual_moments(e, lo, scale, cells, hist, sums):
    """sums += (Σ|e|, Σe², Σe³, Σe⁴), sums[4] / sums[5] keep the min / max; hist += cell counts."""
    a1 = 0.0
    a2 = 0.0
    a3 = 0.0
    a4 = 0.0
    mn = sums[4]
    mx = sums[5]
    for i in range(e.shape[0]):
        r = e[i]
        r2 = r * r
        a1 += abs(r)
        a2 += r2
        a3 += r2 * r
        a4 += r2 * r2
        mn = min(mn, r)
        mx = max(mx, r)
        hist[_cell(r, lo, scale, cells)] += 1
    sums[0] += a1
    sums[1] += a2
    sums[2] += a3
    sums[3] += a4
    sums[4] = mn
    sums[5] = mx


@numba.njit(cache=True, nogil=True)
def design_residuals(A, r0, r1, cols, beta, X, fitted, e):
    """For rows i = r0..r1-1 of A: X[i − r0, j] = A[i, cols[j]]; fitted[i] = X·beta; e[i] = A[i, -1] − fitted[i]."""
    y = A[:, A.shape[1] - 1]
    for i in range(r0, r1):
        fitted[i] = 0.0
    for j in range(cols.shape[0]):
        a = A[:, cols[j]]  # 1-D column views: simpler loops than 2-D indexing (measured ≈ 10 % faster)
        xj = X[:, j]
        b = beta[j]
        for i in range(r0, r1):
            x = a[i]
            xj[i - r0] = x
            fitted[i] += x * b
    for i in range(r0, r1):
        e[i] = y[i] - fitted[i]


# reassoc lets the two column sums use SIMD lanes (a fixed order for a given build: deterministic);
# no flag that assumes finite values, since d = ∞ marks a row of leverage 1
@numba.njit(cache=True, nogil=True, fastmath={"reassoc", "nsz"})
def scores_and_leverage(Z, r0, r1, e, V, h, bp_g, score_sum):
    """For rows i = r0..r1-1 of Z's first p = V.shape[1] / 2 columns (e and h indexed like Z's rows,
    V from 0): h = ‖zᵢ‖²; V[:, :p] = e·z and V[:, p:] = d·e·z with d = h/(1 − h) (∞ for h ≥ 1);
    score_sum += Σ e·z; bp_g += Σ e²·z."""
    p = V.shape[1] // 2
    m = r1 - r0
    for i in range(r0, r1):
        h[i] = 0.0
    for j in range(p):
        zj = Z[:, j]
        for i in range(r0, r1):
            h[i] += zj[i] * zj[i]
    d = np.empty(m)
    for i in range(m):
        hi = h[r0 + i]
        d[i] = hi / (1.0 - hi) if hi < 1.0 else np.inf
    for j in range(p):
        zj = Z[:, j]
        v0 = V[:, j]
        v1 = V[:, p + j]
        s = 0.0
        g = 0.0
        for i in range(m):
            w = zj[r0 + i] * e[r0 + i]
            v0[i] = w
            v1[i] = w * d[i]
            s += w
            g += w * e[r0 + i]
        score_sum[j] += s
        bp_g[j] += g


@numba.njit(cache=True, nogil=True)
def square_moments(e):
    """(mean of e², Σ (e² − mean)²)."""
    m = e.shape[0]
    t = 0.0
    for i in range(m):
        t += e[i] * e[i]
    mean = t / m if m else 0.0
    c = 0.0
    for i in range(m):
        u = e[i] * e[i] - mean
        c += u * u
    return mean, c


@lru_cache(maxsize=None)
def _blas_pointer(name: str):
    """A right-side triangular routine (dtrmm, dtrsm) of scipy's BLAS as a ctypes function (ctypes
    releases the GIL during the call), or None."""
    from tallfit.kernels.lapack_calls import scipy_routine

    vp, pc, pi = ctypes.c_void_p, ctypes.c_char_p, ctypes.POINTER(ctypes.c_int)
    return scipy_routine("cython_blas", name, (pc, pc, pc, pc, pi, pi, vp, vp, pi, vp, pi))


_ONE = np.ones(1)


def times_upper(T: np.ndarray, B: np.ndarray, r0: int = 0, r1: int | None = None) -> np.ndarray:
    """Rows r0..r1-1 of B's first p columns ← themselves times T (upper triangular, p × p), in place
    (BLAS dtrmm); B and T Fortran-ordered float64. Returns B."""
    p = T.shape[0]
    r1 = B.shape[0] if r1 is None else r1
    if not (B.flags.f_contiguous and T.flags.f_contiguous and B.dtype == T.dtype == np.float64
            and B.shape[1] >= p and 0 <= r0 <= r1 <= B.shape[0]):
        raise ValueError("times_upper needs Fortran-ordered float64 arrays of matching shapes")
    if r1 == r0 or p == 0:
        return B
    fn = _blas_pointer("dtrmm")
    if fn is None:  # pragma: no cover - the scipy wrapper, which holds the GIL (and copies)
        from scipy.linalg.blas import dtrmm

        B[r0:r1, :p] = dtrmm(1.0, T, np.asfortranarray(B[r0:r1, :p]), side=1, lower=0)
        return B
    mi, pi, ldt, ldb = (ctypes.c_int(v) for v in (r1 - r0, p, p, B.shape[0]))
    fn(b"R", b"U", b"N", b"N", ctypes.byref(mi), ctypes.byref(pi), _ONE.ctypes.data,
       T.ctypes.data, ctypes.byref(ldt), B.ctypes.data + 8 * r0, ctypes.byref(ldb))
    return B


# -- plain references (tests compare the kernels with these) ----------------------------------
def grid_index_reference(x: np.ndarray, lo: float, scale: float, cells: int) -> np.ndarray:
    t = (np.asarray(x, dtype=float) - lo) * scale
    return np.where(t < 0, 0, np.minimum(np.floor(np.maximum(t, 0)).astype(np.int64) + 1, cells + 1))


def grid_bin_sums_reference(F: np.ndarray, e: np.ndarray, lo, scale, cells: int) -> np.ndarray:
    q = F.shape[1]
    out = np.zeros((q, cells + 2, 4))
    for j in range(q):
        k = grid_index_reference(F[:, j], lo[j], scale[j], cells)
        for col, w in enumerate((np.ones_like(e), F[:, j], e, e * e)):
            out[j, :, col] = np.bincount(k, weights=w, minlength=cells + 2)
    return out


def scatter_rows_reference(codes: np.ndarray, W: np.ndarray, groups: int) -> np.ndarray:
    S = np.zeros((groups, W.shape[1]))
    np.add.at(S, codes, W)
    return S


def scores_and_leverage_reference(Z: np.ndarray, e: np.ndarray):
    """(V, h, Σ e·z, Σ e²·z) by numpy, as ``scores_and_leverage`` computes them."""
    h = np.einsum("ij,ij->i", Z, Z)
    W = Z * e[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        d = np.where(h < 1.0, h / (1.0 - h), np.inf)
        return np.hstack([W, W * d[:, None]]), h, W.sum(axis=0), W.T @ e
