"""Number formatting shared by the renderers."""

from __future__ import annotations

import math


def sig(x: float, digits: int = 6) -> str:
    """Compact form with `digits` significant digits."""
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "—"
    if math.isinf(x):
        return "∞" if x > 0 else "-∞"
    return f"{x:.{digits}g}"


def pval(p: float) -> str:
    if p is None or math.isnan(p):
        return "—"
    if p < 1e-300:
        return "<1e-300"
    if p < 1e-4:
        return f"{p:.1e}"
    return f"{p:.4f}"


def count(n: int) -> str:
    return f"{n:,}"
