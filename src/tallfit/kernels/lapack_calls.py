"""LAPACK's dtpqrt called without holding the GIL, and per-thread control of OpenBLAS threads.

scipy's own wrapper of dtpqrt keeps the GIL for the whole call (measured: two Python threads
folding blocks ran no faster than one), which stalls the reader thread while a tile is factored.
Here the same routine, taken from ``scipy.linalg.cython_lapack`` (so the same library and the
same results), is called through ctypes, which releases the GIL for the duration of a foreign
call. When that pointer cannot be had, the scipy wrapper is used instead.

OpenBLAS starts its own threads for larger products; beside pyarrow's decoding threads and our
own workers they only contend for the two cores (measured: a pass got ≈ 30 % faster with one
BLAS thread). ``single_blas_thread`` asks every loaded OpenBLAS for one thread *in the calling
thread only* (``openblas_set_num_threads_local``), so other threads are unaffected.
"""

from __future__ import annotations

import ctypes
import glob
import os
from contextlib import contextmanager
from functools import lru_cache
from typing import Iterator

import numpy as np

_INT = ctypes.c_int
_PINT = ctypes.POINTER(_INT)


def scipy_routine(module: str, name: str, argtypes: tuple):
    """A routine of scipy's BLAS or LAPACK (``module`` "cython_blas" or "cython_lapack") as a
    ctypes function with the given argument types (ctypes releases the GIL during the call), or
    None when this scipy build does not expose it."""
    try:
        import importlib

        capsule = importlib.import_module(f"scipy.linalg.{module}").__pyx_capi__[name]
        get_name = ctypes.pythonapi.PyCapsule_GetName
        get_name.restype, get_name.argtypes = ctypes.c_char_p, [ctypes.py_object]
        get_ptr = ctypes.pythonapi.PyCapsule_GetPointer
        get_ptr.restype, get_ptr.argtypes = ctypes.c_void_p, [ctypes.py_object, ctypes.c_char_p]
        address = get_ptr(capsule, get_name(capsule))
    except (ImportError, KeyError, AttributeError, ValueError):  # pragma: no cover - other builds
        return None
    if not address:  # pragma: no cover
        return None
    return ctypes.CFUNCTYPE(None, *argtypes)(address)


@lru_cache(maxsize=1)
def _dtpqrt_pointer():
    """The ctypes function for dtpqrt in scipy's LAPACK, or None."""
    vp = ctypes.c_void_p
    return scipy_routine("cython_lapack", "dtpqrt", (_PINT, _PINT, _PINT, _PINT, vp, _PINT, vp, _PINT, vp, _PINT, vp, _PINT))


class TileFolder:
    """Folds tiles of rows into a k × k triangle with dtpqrt; buffers are allocated once."""

    def __init__(self, k: int, tile_rows: int, nb: int) -> None:
        self.k, self.tile_rows, self.nb = k, tile_rows, max(1, min(nb, k))
        self.tile = np.empty((tile_rows, k), dtype=np.float64, order="F")
        self.t = np.empty((self.nb, k), dtype=np.float64, order="F")
        self.work = np.empty(self.nb * k, dtype=np.float64)
        self._fn = _dtpqrt_pointer()

    def fold(self, R: np.ndarray, rows: np.ndarray, pentagonal: int = 0, in_place: bool = False) -> None:
        """R (k × k, Fortran, upper triangle) ← factor of [R; rows]; `rows` has at most tile_rows rows.

        ``in_place``: `rows` (float64, contiguous columns) is factored where it lies and
        overwritten, saving the copy into the tile buffer."""
        m = rows.shape[0]
        if m == 0:
            return
        if in_place and self._fn is not None:
            tile, ld = rows, rows.strides[1] // 8
        else:
            tile, ld = self.tile[:m], self.tile_rows
            tile[...] = rows
        if self._fn is None:  # pragma: no cover - fallback when the pointer is unavailable
            from scipy.linalg import lapack

            out, _v, _t, info = lapack.dtpqrt(pentagonal, self.nb, R, tile, overwrite_a=1)
            R[...] = out
        else:
            args = [_INT(v) for v in (m, self.k, pentagonal, self.nb)]
            lda, ldb, ldt, info_c = _INT(self.k), _INT(ld), _INT(self.nb), _INT(0)
            self._fn(
                *(ctypes.byref(a) for a in args),
                R.ctypes.data, ctypes.byref(lda),
                tile.ctypes.data, ctypes.byref(ldb),
                self.t.ctypes.data, ctypes.byref(ldt),
                self.work.ctypes.data, ctypes.byref(info_c),
            )
            info = info_c.value
        if info != 0:  # pragma: no cover - LAPACK argument error, a programming fault
            raise RuntimeError(f"dtpqrt failed with info={info}")


@lru_cache(maxsize=1)
def _openblas_local_setters() -> tuple:
    """``openblas_set_num_threads_local`` of every OpenBLAS loaded in this process."""
    paths: set[str] = set()
    try:
        with open("/proc/self/maps") as maps:
            for line in maps:
                if "openblas" in line and ".so" in line:
                    paths.add(line.split()[-1])
    except OSError:  # pragma: no cover - not Linux
        import numpy as _np
        import scipy as _sp

        for pkg in (_np, _sp):
            root = os.path.dirname(os.path.dirname(pkg.__file__))
            paths.update(glob.glob(os.path.join(root, "*.libs", "*openblas*.so*")))
    setters = []
    for path in sorted(paths):
        try:
            fn = ctypes.CDLL(path).openblas_set_num_threads_local
        except (OSError, AttributeError):
            continue
        fn.restype, fn.argtypes = _INT, [_INT]
        setters.append(fn)
    return tuple(setters)


@contextmanager
def single_blas_thread() -> Iterator[None]:
    """Within the block, BLAS/LAPACK calls made from this thread use one OpenBLAS thread."""
    import scipy.linalg  # noqa: F401  (make sure scipy's OpenBLAS is loaded before looking)

    setters = _openblas_local_setters()
    previous = [fn(1) for fn in setters]
    try:
        yield
    finally:
        for fn, n in zip(setters, previous):
            fn(max(0, n))
