"""Plain-words advice from the diagnostics: what the checks found and what to do about it."""

from __future__ import annotations

from typing import Any

SPREAD_RATIO = 2.0  # common practice: residual spread varying by more than ~2× is worth acting on
HEAVY_TAILS = 3.0  # excess kurtosis above this (a normal has 0) points at outliers


def advice(diag: dict[str, Any], robust: dict[str, Any] | None) -> list[str]:
    """One sentence per finding, most actionable first."""
    out: list[str] = []
    for f in diag["features"]:
        c = f["curvature"]
        if c["curved"]:
            out.append(
                f"{f['name']}: the straight line misses a bend ({c['direction']}; binned residual "
                f"means depart from a line by up to {c['bend']:.0%} of the residual sd, p {c['p_value']:.1e}). "
                f"Add a squared term of {f['name']}, or its log if it is positive and the effect "
                "flattens out, or split it into ranges"
            )
    bp = diag.get("breusch_pagan")
    ratio = diag["fitted"].get("spread_ratio", float("nan"))
    if bp and bp["p_value"] < 0.01:
        msg = (
            f"the noise is not constant (Breusch–Pagan {bp['statistic']:.4g} on {bp['df']} df, "
            f"p {bp['p_value']:.1e}"
        )
        if ratio == ratio:
            msg += f"; residual spread varies {ratio:.1f}× across fitted values"
        msg += "): the plain standard errors are unreliable, use robust ones (--robust HC3)"
        if robust:
            msg += f" — shown here as {robust['selected']}"
        out.append(msg)
    elif ratio == ratio and ratio > SPREAD_RATIO:
        out.append(
            f"residual spread varies {ratio:.1f}× across fitted values; robust standard errors "
            "(--robust HC3) are the safer choice"
        )
    if robust and robust.get("clusters"):
        plain_vs = robust.get("max_ratio_to_plain")
        if plain_vs and plain_vs > 1.5:
            out.append(
                f"clustered errors are up to {plain_vs:.1f}× the plain ones: rows within a cluster are "
                "not independent, so the plain errors overstate the precision"
            )
    res = diag["residuals"]
    if res["excess_kurtosis"] == res["excess_kurtosis"] and res["excess_kurtosis"] > HEAVY_TAILS:
        out.append(
            f"the residuals have heavy tails (excess kurtosis {res['excess_kurtosis']:.1f}; a normal "
            "has 0): look at the largest residuals listed below for faulty readings or a missing "
            "term; estimates are still unbiased but intervals for new rows are too narrow"
        )
    if not diag.get("same_data", True):
        out.append(
            "these data are not the rows the model was fitted on, so robust errors and the "
            "Breusch–Pagan test are not shown; the residual checks describe how the model does on them"
        )
    if not out:
        out.append("no curvature, unequal noise or heavy tails large enough to act on were found")
    return out
