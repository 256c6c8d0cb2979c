"""Kernels of the second pass, each beside a plain-numpy reference used in tests.

* ``tile_scores``: from a row tile [Z | e] (one BLAS product of the design rows with the plan's
  tile map gives Z = X R11⁻¹ and e = y − Xβ together), the fitted values, leverages
  h = ‖zᵢ‖², the scores w = e·z, the sandwich rows of the chosen HC estimator, Σ w and the
  Breusch–Pagan sums Σ z e².
* ``grid_bin_sums`` (``grid_bin_sums_rows`` for a range of rows): per chosen column of a block,
  the cell of every row on a uniform grid and, per cell, the row count, Σx, Σe and Σe² (a multiply
  and one 4-wide add per value: measured ≈ 1.4 ns per value here, against ≈ 13 ns for sample-quantile
  edges found through a lookup table and ≈ 30 ns by binary search, whose branches mispredict).
* ``grid_bin_sums_weighted``: the same sums with a frequency weight per row.
* ``square_moments``: mean and centred sum of squares of e² (one block, two sweeps).
* ``grid_index``: the grid cell of each value of one column (fitted values, residuals).
* ``scatter_rows``: S[code[i], :] += W[i, :] (cluster score sums).
* ``gather_add``: W[i, :] += T[code[i], :] (the indicator columns' rows of the tile map), and
  ``gather_add_scaled`` with a factor per row (an absorbed level's row, for rows scaled by √w).
* ``residual_block_sums``: one sweep for the fitted-value bins, the fitted × residual histogram
  and the residual sketch of a block.
* ``residual_moments``: Σ|e|, Σe², Σe³, Σe⁴, min, max and a histogram on a fixed grid.

The pass runs the product, ``tile_scores``, the sandwich Gram and the feature bins on row tiles
that stay in the core's cache between steps (each step is bound by memory traffic when it sweeps
a whole 10 MB block).

A grid is (lo, scale, cells): cell 0 holds x < lo, cell k (1 ≤ k ≤ cells) holds
lo + (k−1)/scale ≤ x < lo + k/scale, and cell cells + 1 everything above, so no row is lost.
"""

from __future__ import annotations

import numba
import numpy as np

from tallfit.kernels.lanes import add4


# Kernels index views that start at 0 (a[r0:r1], then a[i]): with a loop over range(r0, r1),
# numba cannot rule out negative indices, keeps its wrap-around branch and LLVM does not vectorise
# (measured ≈ 7× slower for the cell index). nnan/ninf: the rows reaching them are finite.
_FAST = {"nnan", "ninf", "nsz"}


@numba.njit(cache=True, nogil=True, inline="always", fastmath=_FAST)
def _cell(x, lo, scale, cells):
    # t < 0 → cell 0, t ≥ cells → cells + 1, else ⌊t⌋ + 1: branch-free, so loops of it vectorise.
    # ⌊t⌋ as truncation to int32, less one where that rounded up (t in (-1, 0)): AVX2 has no
    # packed double → int64 conversion, and with one the loop measured 2.5× slower.
    t = min(max((x - lo) * scale, -1.0), float(cells))
    c = np.int32(t)
    return c - np.int32(t < c) + np.int32(1)


@numba.njit(cache=True, nogil=True, fastmath=_FAST)
def grid_bin_sums_rows(A, r0, r1, cols, e, lo, scale, cells, out, kbuf):
    """out[j, k] += (1, x, e, e²) over rows r0..r1-1 of column cols[j] of A in grid cell k (e and
    kbuf indexed by the same rows). The columns' ranges are the caller's (BinnedSums.update):
    numba's min/max would keep the cell loop from vectorising."""
    ev = e[r0:r1]
    kb = kbuf[r0:r1]
    for j in range(cols.shape[0]):
        a = A[r0:r1, cols[j]]
        lj = lo[j]
        sj = scale[j]
        for i in range(a.shape[0]):  # indices first, then the scatter: two simple loops run faster
            kb[i] = _cell(a[i], lj, sj, cells)
        o = out[j]  # one column's cells (33 KB at 1024 cells)
        for i in range(a.shape[0]):
            r = ev[i]
            add4(o, kb[i], 1.0, a[i], r, r * r)  # one 4-wide update: kernels/lanes.py


@numba.njit(cache=True, nogil=True, fastmath=_FAST)
def grid_bin_sums_weighted(A, cols, e, w, lo, scale, cells, out, kbuf):
    """out[j, k] += wᵢ·(1, x, e, e²) over the rows of column cols[j] of A in grid cell k: each row
    stands for wᵢ rows (frequency weights; a plain pass uses ``grid_bin_sums_rows``)."""
    for j in range(cols.shape[0]):
        a = A[:, cols[j]]
        lj = lo[j]
        sj = scale[j]
        for i in range(a.shape[0]):
            kbuf[i] = _cell(a[i], lj, sj, cells)
        o = out[j]
        for i in range(a.shape[0]):
            wi = w[i]
            r = e[i]
            add4(o, kbuf[i], wi, wi * a[i], wi * r, wi * r * r)


@numba.njit(cache=True, nogil=True)
def grid_bin_sums(A, cols, e, lo, scale, cells, out, kbuf):
    """``grid_bin_sums_rows`` over every row of A."""
    grid_bin_sums_rows(A, 0, A.shape[0], cols, e, lo, scale, cells, out, kbuf)


@numba.njit(cache=True, nogil=True, fastmath=_FAST)
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


def level_tables(M: np.ndarray, start: int, widths) -> list[np.ndarray]:
    """Per categorical (``widths[c]`` indicator columns, laid out in M's rows from ``start`` on):
    M's rows of its columns after two zero rows for the codes −2 (null) and −1 (reference), so a
    row's code + 2 indexes its table (``gather_add``, or ``table[codes + 2]``)."""
    out, at = [], start
    for w in widths:
        T = np.zeros((w + 2,) + M.shape[1:], order="F")
        T[2:] = M[at: at + w]
        out.append(T)
        at += w
    return out


@numba.njit(cache=True, nogil=True)
def gather_add(codes, r0, T, W):  # pragma: no cover - compiled
    """W[i, :] += T[codes[r0 + i] + 2, :] for W's rows (rows 0, 1 of T: the codes −2, −1)."""
    m, q = W.shape
    c = codes[r0 : r0 + m]
    for j in range(q):
        w = W[:, j]
        t = T[:, j]
        for i in range(m):
            w[i] += t[c[i] + 2]


@numba.njit(cache=True, nogil=True)
def gather_add_scaled(codes, r0, T, W, scale):  # pragma: no cover - compiled
    """W[i, :] += scale[r0 + i] · T[codes[r0 + i] + 2, :] (``gather_add`` for rows scaled by √w)."""
    m, q = W.shape
    c = codes[r0 : r0 + m]
    f = scale[r0 : r0 + m]
    for j in range(q):
        w = W[:, j]
        t = T[:, j]
        for i in range(m):
            w[i] += f[i] * t[c[i] + 2]


@numba.njit(cache=True, nogil=True)
def residual_moments(e, lo, scale, cells, hist, sums):
    """sums += (Σ|e|, Σe², Σe³, Σe⁴), sums[4] / sums[5] keep the min / max; hist += cell counts."""
    m = (0.0, 0.0, 0.0, 0.0, sums[4], sums[5])
    for i in range(e.shape[0]):
        r = e[i]
        m = _moment_step(m, r)
        hist[_cell(r, lo, scale, cells)] += 1
    _moments_into(m, sums)


@numba.njit(cache=True, nogil=True, inline="always")
def _moment_step(m, r):
    """(Σ|e|, Σe², Σe³, Σe⁴, min, max) with one more residual r."""
    r2 = r * r
    return m[0] + abs(r), m[1] + r2, m[2] + r2 * r, m[3] + r2 * r2, min(m[4], r), max(m[5], r)


@numba.njit(cache=True, nogil=True, inline="always")
def _moments_into(m, sums):
    for j in range(4):
        sums[j] += m[j]
    sums[4] = m[4]
    sums[5] = m[5]


@numba.njit(cache=True, nogil=True)
def residual_block_sums(fitted, e, fgrid, ftab, franges, heat_grid, heat, rgrid, hist, moments):
    """One sweep over a block's rows for what the pass keeps of its fitted values and residuals,
    the same sums, in the same order, as ``grid_bin_sums_rows`` on the fitted values, ``grid_index``
    twice and a count per pair of cells (the heat map), and ``residual_moments`` (one sweep instead
    of six; in the pass the diagnostics other than the feature bins cost ≈ 0.15–0.2 s of CPU per
    10^7 rows before):

    * fitted-value bins: ftab[k] += (1, f, e, e²) for f's cell k on the grid fgrid = (lo, scale,
      cells); franges[0] / franges[1] keep f's min / max;
    * heat[a, b] += 1 for f's cell a and e's cell b on heat_grid = (f lo, f scale, e lo, e scale, cells);
    * hist[e's cell on rgrid = (lo, scale, cells)] += 1 and moments += (Σ|e|, Σe², Σe³, Σe⁴),
      moments[4] / moments[5] keep e's min / max."""
    flo, fscale, fcells = fgrid[0], fgrid[1], np.int64(fgrid[2])
    hflo, hfscale, helo, hescale, hcells = heat_grid[0], heat_grid[1], heat_grid[2], heat_grid[3], np.int64(heat_grid[4])
    rlo, rscale, rcells = rgrid[0], rgrid[1], np.int64(rgrid[2])
    fmin, fmax = franges[0], franges[1]
    m = (0.0, 0.0, 0.0, 0.0, moments[4], moments[5])
    for i in range(e.shape[0]):
        f = fitted[i]
        r = e[i]
        add4(ftab, _cell(f, flo, fscale, fcells), 1.0, f, r, r * r)
        fmin = min(fmin, f)
        fmax = max(fmax, f)
        heat[_cell(f, hflo, hfscale, hcells), _cell(r, helo, hescale, hcells)] += 1
        m = _moment_step(m, r)
        hist[_cell(r, rlo, rscale, rcells)] += 1
    franges[0] = fmin
    franges[1] = fmax
    _moments_into(m, moments)


# Sandwich rows per data row (solve.robust.SandwichSums.mode): the rows V whose Gram V'V is summed.
SCORES = 0  # V = w (HC0, HC1): Z's own columns, which become the scores
SCORES_HC2 = 2  # V = w / √(1 − h)
SCORES_HC3 = 3  # V = w / (1 − h)
SCORES_ALL = 4  # V = [w | d·w], d = h / (1 − h): every HC meat from one Gram


SCORE_ROWS = 512  # tile_scores works through a tile in runs of rows that stay in the core's L1/L2


# reassoc lets the column sums use SIMD lanes (a fixed order for a given build: deterministic);
# no flag that assumes finite values, since ∞ marks a row of leverage 1. error_model="numpy":
# a division by zero gives ∞ instead of a check and a branch per row, which kept the leverage
# loops scalar (with it, and e copied out of the tile so that stores to the scores cannot alias
# it, the kernel measured 65 → 32 µs per 4096 × 22 tile here)
@numba.njit(cache=True, nogil=True, fastmath={"reassoc", "nsz"}, error_model="numpy")
def tile_scores(ZE, m, r0, y, mode, V, e, fitted, h, bp_g, score_sum, keep_scores, h0):
    """From a tile ZE = [Z | e] (rows 0..m-1; Z = X R11⁻¹ and e = y − Xβ, one product of the design
    rows with PassPlan.tile_map), for the block's rows r0..r0+m-1: e, fitted = y − e and the
    leverage h = h0 + ‖zᵢ‖² (h0: the block's rows' share of swept-out levels, 1/n_g; empty: 0);
    score_sum += Σ w and bp_g += Σ e²·z (Breusch–Pagan) for the scores
    w = e·z. Z's columns become the scores (in place) and V the sandwich rows of ``mode`` (V unused
    for SCORES); or, for HC2 and HC3 unless ``keep_scores``, Z's columns become the sandwich rows
    themselves (V unused): no second tile to write and read back when nothing else needs w.
    Every step runs on SCORE_ROWS rows at a time, so the tile's rows are read from the cache
    nearest the core by the second step."""
    p = ZE.shape[1] - 1
    ev = np.empty(SCORE_ROWS)
    hl = np.empty(SCORE_ROWS)
    c = np.empty(SCORE_ROWS)  # V's row multiplier (d for SCORES_ALL)
    for a in range(0, m, SCORE_ROWS):
        n = min(SCORE_ROWS, m - a)
        er = ZE[a:a + n, p]
        eo = e[r0 + a:r0 + a + n]
        fo = fitted[r0 + a:r0 + a + n]
        yv = y[r0 + a:r0 + a + n]
        for i in range(n):
            r = er[i]
            ev[i] = r
            eo[i] = r
            fo[i] = yv[i] - r
            hl[i] = 0.0
        if h0.shape[0]:
            hb = h0[r0 + a:r0 + a + n]
            for i in range(n):
                hl[i] = hb[i]
        for j in range(p):
            zj = ZE[a:a + n, j]
            for i in range(n):
                hl[i] += zj[i] * zj[i]
        ho = h[r0 + a:r0 + a + n]
        for i in range(n):
            ho[i] = hl[i]
        if mode == SCORES_HC2:  # one loop per mode, so each vectorises
            for i in range(n):
                c[i] = 1.0 / np.sqrt(1.0 - hl[i]) if hl[i] < 1.0 else np.inf
        elif mode == SCORES_HC3:
            for i in range(n):
                c[i] = 1.0 / (1.0 - hl[i]) if hl[i] < 1.0 else np.inf
        elif mode == SCORES_ALL:
            for i in range(n):
                c[i] = hl[i] / (1.0 - hl[i]) if hl[i] < 1.0 else np.inf
        for j in range(p):
            zj = ZE[a:a + n, j]
            s = 0.0
            g = 0.0
            if mode == SCORES:
                for i in range(n):
                    w = zj[i] * ev[i]
                    zj[i] = w
                    s += w
                    g += w * ev[i]
            elif mode == SCORES_ALL:
                v0 = V[a:a + n, j]
                v1 = V[a:a + n, p + j]
                for i in range(n):
                    w = zj[i] * ev[i]
                    zj[i] = w
                    v0[i] = w
                    v1[i] = w * c[i]
                    s += w
                    g += w * ev[i]
            elif keep_scores:
                vj = V[a:a + n, j]
                for i in range(n):
                    w = zj[i] * ev[i]
                    zj[i] = w
                    vj[i] = w * c[i]
                    s += w
                    g += w * ev[i]
            else:
                for i in range(n):
                    w = zj[i] * ev[i]
                    zj[i] = w * c[i]
                    s += w
                    g += w * ev[i]
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


def tile_scores_reference(Z: np.ndarray, e: np.ndarray, mode: int, h0: np.ndarray | None = None):
    """(V, h, w, Σ w, Σ e²·z) by numpy, as ``tile_scores`` computes them (V = w for SCORES)."""
    h = np.einsum("ij,ij->i", Z, Z) + (0.0 if h0 is None else h0)
    W = Z * e[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        one = np.where(h < 1.0, 1.0 - h, 0.0)
        c = {SCORES: np.ones_like(h), SCORES_HC2: 1.0 / np.sqrt(one), SCORES_HC3: 1.0 / one,
             SCORES_ALL: np.where(h < 1.0, h / one, np.inf)}[mode]
        V = np.hstack([W, W * c[:, None]]) if mode == SCORES_ALL else W * c[:, None]
    return V, h, W, W.sum(axis=0), W.T @ e
