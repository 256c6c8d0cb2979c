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


def table(rows: list[tuple[str, ...]] | list[list[str]]) -> list[str]:
    """Text table: first column left-aligned, the rest right-aligned, a dotted rule under the header."""
    widths = [max(len(r[c]) for r in rows) for c in range(len(rows[0]))]
    out = []
    for r in rows:
        cells = [r[0].ljust(widths[0])] + [r[c].rjust(widths[c]) for c in range(1, len(r))]
        out.append("  " + "  ".join(cells))
    out.insert(1, "  " + "  ".join("·" * w for w in widths))
    return out
