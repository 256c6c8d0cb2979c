"""p-values adjusted for testing many hypotheses at once."""

from __future__ import annotations

import numpy as np


def holm(p) -> np.ndarray:
    """Holm's step-down adjusted p-values (Holm 1979, Scand. J. Statist. 6: 65–70): the i-th
    smallest of m becomes max over j ≤ i of min(1, (m − j + 1)·p₍ⱼ₎). Rejecting where the adjusted
    value is below α keeps the chance of any false rejection at most α. NaN stays NaN and is not
    counted among the m tests."""
    p = np.asarray(p, dtype=float)
    out = np.full(p.shape, np.nan)
    ok = np.flatnonzero(np.isfinite(p))
    m = ok.size
    if m == 0:
        return out
    order = ok[np.argsort(p[ok], kind="stable")]
    scaled = np.minimum(1.0, (m - np.arange(m)) * p[order])
    out[order] = np.maximum.accumulate(scaled)
    return out
