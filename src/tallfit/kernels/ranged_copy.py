"""A column copied into a design matrix with its range measured on the way (one sweep, not three).

``copy_with_range(src, bits, dst)`` does dst[:] = src and returns (min, max, finite): the smallest
and largest value and whether every value is finite. Finiteness is read off the exponent bits of
``bits`` (the same buffer viewed as int64: a double is NaN or ±∞ exactly when its 11 exponent bits
are all ones), integer operations that fast-math flags do not touch; the min and max use those
flags, so they vectorise, and are meaningful only when ``finite`` is true (the caller then takes
the slow path that finds and drops the bad rows). Measured here on a 65,536 × 22 block from
columns out of cache: 1.18 ms for numpy's copy, min and max against 0.90 ms.
"""

from __future__ import annotations

import numba
import numpy as np

_EXPONENT = np.int64(0x7FF0000000000000)


@numba.njit(cache=True, nogil=True, fastmath={"nnan", "ninf"})
def copy_with_range(src, bits, dst):  # pragma: no cover - compiled
    """dst[:] = src; (min, max, every value finite). ``bits`` is ``src.view(np.int64)``."""
    lo = np.inf
    hi = -np.inf
    bad = np.int64(0)
    for i in range(src.shape[0]):
        v = src[i]
        dst[i] = v
        lo = min(lo, v)
        hi = max(hi, v)
        bad |= (bits[i] & _EXPONENT) == _EXPONENT
    return lo, hi, bad == 0
