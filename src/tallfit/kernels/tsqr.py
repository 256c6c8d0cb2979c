"""Tall-skinny QR: the triangular factor of a block of rows, folded into a running factor.

The running factor R (k × k, upper triangular) satisfies R'R = A'A for every row seen so far.
A block is processed in cache-sized row tiles: each tile is stacked under the current R and
re-factored by LAPACK's triangle-over-rectangle Householder QR (dtpqrt), so the work per row is
one Householder sweep over k columns and the tile stays in cache. Householder QR and this merge are
backward stable (Demmel, Grigori, Hoemmen & Langou, SIAM J. Sci. Comput. 34, 2012), unlike
accumulating A'A, which squares the condition number.

`merge_factors` combines two running factors the same way, which makes the factor a monoid:
batches, files, threads and cluster workers all reduce with it.

`triangular_factor_reference` is the plain NumPy version used in tests.
"""

from __future__ import annotations

import threading

import numpy as np
from scipy.linalg import lapack

from tallfit.kernels.lapack_calls import TileFolder

#: Rows per tile and LAPACK block size, measured on this machine (2 cores, OpenBLAS) with
#: bench/bench_kernels.py: narrow factors are fastest with ~8k-row tiles and a small block
#: (k = 22: ≈ 80-90 ns per row against ≈ 230 for dgeqrf on 512-row tiles); wide ones with tiles of
#: ~1-4 MB and a block of 32, where dtpqrt's trailing updates become BLAS-3 (k = 501: ≈ 43 GFLOP/s).
TILE_BYTES = 1 << 20
MIN_TILE_ROWS = 1024
MAX_TILE_ROWS = 8192


def default_tile_rows(k: int) -> int:
    """Rows per tile: about a megabyte of rows, between 1024 and 8192 rows."""
    return int(min(MAX_TILE_ROWS, max(MIN_TILE_ROWS, TILE_BYTES // (8 * max(1, k)))))


def default_block(k: int) -> int:
    """LAPACK block size for dtpqrt: small for narrow factors (level-2 work), 32 for wide ones."""
    return max(1, min(k, 4 if k <= 40 else 16 if k <= 160 else 32))


def fold_rows(R: np.ndarray, A: np.ndarray, tile_rows: int | None = None, *, overwrite: bool = False,
              into: bool = False) -> np.ndarray:
    """Return the triangular factor of [R; A] (k × k), processing A in tiles of `tile_rows` rows.

    Each tile is folded by LAPACK's dtpqrt, the Householder QR of a triangle stacked on a
    rectangle, which never touches the triangle's zeros (same reflectors as dgeqrf on [R; tile]).
    R may be any k × k upper-triangular array (zeros for a fresh factor). A is (m, k) float64;
    Fortran order is cheapest. R is not modified; A neither, unless ``overwrite``: then a float64
    A with contiguous columns is factored where it lies (no tile copy) and left holding
    reflectors. The GIL is released while LAPACK works (see lapack_calls).

    ``into``: R (Fortran-order float64, zero below the diagonal, as fold_rows returns it) is
    updated in place and returned, saving two k × k copies per call (≈ 5 % of a p = 500 fold).
    """
    m, k = A.shape
    if R.shape != (k, k):
        raise ValueError(f"factor is {R.shape}, block has {k} columns")
    if m == 0:
        return R.copy()
    if k == 0:
        return R.copy()
    tile_rows = default_tile_rows(k) if tile_rows is None else max(1, int(tile_rows))
    folder = _folder(k, min(tile_rows, m))
    reuse = into and R.dtype == np.float64 and R.flags.f_contiguous and R.flags.writeable
    current = R if reuse else np.array(np.triu(R), dtype=np.float64, order="F")
    in_place = (overwrite and A.dtype == np.float64 and A.flags.writeable and k > 1
                and A.strides[0] == 8 and A.strides[1] >= 8 * m)
    for start in range(0, m, tile_rows):
        folder.fold(current, A[start : start + tile_rows], in_place=in_place)
    if not reuse:  # dtpqrt writes the upper triangle only: a zero lower part stays zero
        current = np.triu(current)
    if not np.all(np.isfinite(np.diagonal(current))):
        raise FloatingPointError("non-finite value in the triangular factor")
    return current


_local = threading.local()


def _folder(k: int, tile_rows: int) -> TileFolder:
    """This thread's tile buffers for (k, tile_rows), kept for the next block of the same shape."""
    cache = getattr(_local, "folders", None)
    if cache is None:
        cache = _local.folders = {}
    key = (k, tile_rows)
    folder = cache.get(key)
    if folder is None:
        if len(cache) > 8:
            cache.clear()
        folder = cache[key] = TileFolder(k, tile_rows, default_block(k))
    return folder


def merge_factors(Ra: np.ndarray, Rb: np.ndarray) -> np.ndarray:
    """Triangular factor of the union of the rows behind two factors: triu(qr([Ra; Rb])).

    Rb is triangular too, so dtpqrt is told so (its pentagonal part is the whole of Rb).
    """
    k = Ra.shape[0]
    if Ra.shape != (k, k) or Rb.shape != (k, k):
        raise ValueError(f"cannot merge factors of shapes {Ra.shape} and {Rb.shape}")
    if k == 0:
        return Ra.copy()
    top = np.array(np.triu(Ra), dtype=np.float64, order="F")
    bottom = np.array(np.triu(Rb), dtype=np.float64, order="F")
    out, _v, _t, info = lapack.dtpqrt(k, default_block(k), top, bottom, overwrite_a=1, overwrite_b=1)
    if info != 0:  # pragma: no cover - LAPACK argument error, a programming fault
        raise RuntimeError(f"dtpqrt failed with info={info}")
    out = np.triu(out)
    if not np.all(np.isfinite(np.diagonal(out))):
        raise FloatingPointError("non-finite value in the triangular factor")
    return out


def normalize_signs(R: np.ndarray) -> np.ndarray:
    """Flip rows so the diagonal is non-negative (R'R is unchanged); a canonical form for storage."""
    signs = np.where(np.diagonal(R) < 0, -1.0, 1.0)
    return R * signs[:, None]


def triangular_factor_reference(A: np.ndarray) -> np.ndarray:
    """In-memory Householder QR of all rows at once (NumPy), sign-normalised; for tests."""
    k = A.shape[1]
    if A.shape[0] < k:
        A = np.vstack([A, np.zeros((k - A.shape[0], k))])
    R = np.linalg.qr(A, mode="r")
    return normalize_signs(R)
