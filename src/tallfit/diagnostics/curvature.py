"""Is the straight line right for a feature? A test of binned residual means against a line.

If the model is linear in feature x, the mean residual in every bin of x is zero up to noise, so
the bins' means lie on a flat line. Fit a weighted line to the bin means ēᵦ (weights nᵦ/sᵦ², the
precision of each mean, so unequal noise is allowed for) and measure the misfit
Q = Σ wᵦ (ēᵦ − a − b·x̄ᵦ)², χ² with B − 2 degrees of freedom under linearity (a lack-of-fit test
on grouped data, as in Draper & Smith, Applied Regression Analysis, §2.1, with the bins as
groups). With millions of rows a bend too small to matter is still "significant", so a flag
needs both a small p-value (Bonferroni over the features tested, since many tests inflate false
discoveries) and a bend of practical size: the largest distance of a bin's mean from the line at
least ``MIN_BEND`` of the residual standard deviation. (Rows that are not independent, such as
minutes of one host, make the χ² too large; the size condition guards against that too.)
"""

from __future__ import annotations

from typing import Any

import numpy as np

from tallfit.diagnostics.bins import BinnedSummary
from tallfit.solve.distributions import chi2_sf

ALPHA = 0.01
MIN_BEND = 0.10  # common practice: judge the size of a misfit, not only its p-value (10 % of s is our choice)
MIN_BINS = 4


def _weighted_poly(x: np.ndarray, y: np.ndarray, w: np.ndarray, degree: int) -> tuple[np.ndarray, np.ndarray]:
    V = np.vander(x - np.average(x, weights=w), degree + 1, increasing=True)
    sw = np.sqrt(w)
    coef, *_ = np.linalg.lstsq(V * sw[:, None], y * sw, rcond=None)
    return V @ coef, coef


def line_test(b: BinnedSummary, residual_sd: float, tests: int = 1) -> dict[str, Any]:
    """The lack-of-fit statistic, p-value, size of the bend, its direction and the flag."""
    keep = b.count > 0
    B = int(keep.sum())
    if B < MIN_BINS:
        return {"bins": B, "statistic": float("nan"), "df": 0, "p_value": float("nan"),
                "bend": float("nan"), "direction": "", "curved": False,
                "reason": "too few distinct values to judge curvature"}
    n = b.count[keep].astype(float)
    x, y = b.x_mean[keep], b.resid_mean[keep]
    pooled = float(np.average(np.nan_to_num(b.resid_sd[keep] ** 2), weights=n))
    var = np.where((n >= 10) & np.isfinite(b.resid_sd[keep]), b.resid_sd[keep] ** 2, pooled)
    var = np.maximum(var, 1e-300)
    w = n / var
    line, _ = _weighted_poly(x, y, w, 1)
    dev = y - line
    Q = float(np.sum(w * dev * dev))
    df = B - 2
    p = float(chi2_sf(Q, df))
    bend = float(np.max(np.abs(dev)) / residual_sd) if residual_sd > 0 else float("nan")
    _, quad = _weighted_poly(x, y, w, 2)
    direction = "bends upward (convex)" if quad[2] > 0 else "bends downward (concave)"
    curved = bool(p < ALPHA / max(tests, 1) and bend >= MIN_BEND)
    return {"bins": B, "statistic": Q, "df": df, "p_value": p, "bend": bend, "direction": direction,
            "curved": curved, "reason": ""}
