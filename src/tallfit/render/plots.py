"""The report's figures (matplotlib, Agg backend): each function returns a Figure.

Our own look: slate ink, a teal accent for the plain fit, amber for robust or flagged things,
thin rules, no box around the axes.
"""

from __future__ import annotations

import io
from typing import Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.colors import LogNorm  # noqa: E402

from tallfit.solve.distributions import norm_pdf  # noqa: E402

INK = "#263238"
TEAL = "#00897b"
AMBER = "#ef8f00"
GRID = "#cfd8dc"
STYLE = {
    "font.size": 8.5, "axes.edgecolor": GRID, "axes.labelcolor": INK, "xtick.color": INK,
    "ytick.color": INK, "axes.spines.top": False, "axes.spines.right": False, "axes.grid": True,
    "grid.color": GRID, "grid.linewidth": 0.5, "axes.titlesize": 9, "axes.titleweight": "bold",
    "svg.fonttype": "none",
}


def _figure(w: float, h: float):
    with plt.rc_context(STYLE):
        return plt.figure(figsize=(w, h), dpi=110)


def encode(fig) -> tuple[bytes, bytes]:
    """PNG and SVG bytes of a figure (which is then closed)."""
    png, svg = io.BytesIO(), io.BytesIO()
    with plt.rc_context(STYLE):
        fig.savefig(png, format="png", bbox_inches="tight")
        fig.savefig(svg, format="svg", bbox_inches="tight")
    plt.close(fig)
    return png.getvalue(), svg.getvalue()


def coefficients(terms: list[str], est, low, high, rlow=None, rhigh=None, robust_label: str = ""):
    """One row per term, each on its own scale: the plain interval, and the robust one below it."""
    n = len(terms)
    fig = _figure(6.4, 0.42 * n + 0.6)
    with plt.rc_context(STYLE):
        axes = fig.subplots(n, 1, squeeze=False)[:, 0]
        for i, ax in enumerate(axes):
            ax.hlines(0.15, low[i], high[i], color=TEAL, lw=3, label="plain interval" if i == 0 else None)
            if rlow is not None:
                ax.hlines(-0.2, rlow[i], rhigh[i], color=AMBER, lw=1.6,
                          label=f"{robust_label} interval" if i == 0 else None)
            ax.plot([est[i]], [0.15], "o", color=INK, ms=3.5)
            lo = min(low[i], rlow[i]) if rlow is not None else low[i]
            hi = max(high[i], rhigh[i]) if rhigh is not None else high[i]
            if not (np.isfinite(lo) and np.isfinite(hi)):
                lo, hi = est[i] - 1.0, est[i] + 1.0
            pad = 0.08 * (hi - lo or 1.0)
            ax.set_xlim(lo - pad, hi + pad)
            ax.set_ylim(-0.6, 0.6)
            ax.set_yticks([])
            ax.set_ylabel(terms[i], rotation=0, ha="right", va="center")
            if ax.get_xlim()[0] < 0 < ax.get_xlim()[1]:
                ax.axvline(0, color=INK, lw=0.6, ls=":")
            ax.tick_params(axis="x", labelsize=7)
            ax.grid(axis="y", visible=False)
        if n:
            fig.legend(loc="upper right", frameon=False, ncol=2, fontsize=7.5)
        fig.suptitle("estimates with intervals (each term on its own scale)", x=0.01, ha="left", fontsize=9)
        fig.subplots_adjust(hspace=0.9)
    return fig


def binned_residuals(feature: dict[str, Any]):
    """Residual mean (± 2 standard errors) and spread per bin of a feature; partial residuals."""
    b = feature["bins"]
    x = np.asarray(b["x_mean"])
    m = np.asarray(b["resid_mean"])
    sd = np.asarray(b["resid_sd"])
    n = np.asarray(b["count"], dtype=float)
    se = np.where(n > 1, sd / np.sqrt(n), np.nan)
    flagged = feature["curvature"]["curved"]
    fig = _figure(6.4, 2.3)
    with plt.rc_context(STYLE):
        a1, a2 = fig.subplots(1, 2)
        a1.axhline(0, color=INK, lw=0.7)
        a1.text(0.01, 0.02, f"residual sd within bins ≈ {np.nanmedian(sd):.3g}", transform=a1.transAxes,
                fontsize=6.5, color=INK)
        a1.errorbar(x, m, yerr=2 * se, fmt="o", ms=3, color=AMBER if flagged else TEAL, lw=1,
                    label="mean residual ± 2 se")
        a1.set_xlabel(feature["name"])
        a1.set_ylabel("residual")
        a1.set_title("binned residuals" + (" — curved" if flagged else ""))
        a1.legend(frameon=False, fontsize=6.5, loc="best")
        pr = np.asarray(feature["partial_residual"])
        a2.plot(x, pr, "o", ms=3, color=AMBER if flagged else TEAL, label="binned partial residual")
        xs = np.linspace(np.min(b["x_low"]), np.max(b["x_high"]), 50)
        a2.plot(xs, feature["coef"] * xs - feature["coef"] * np.average(x, weights=n) + np.average(pr, weights=n),
                color=INK, lw=1, label="fitted line")
        a2.set_xlabel(feature["name"])
        a2.set_title("component + residual")
        a2.legend(frameon=False, fontsize=6.5, loc="best")
        fig.tight_layout()
    return fig


def fitted_heat(heat: dict[str, Any], fitted_bins: dict[str, Any]):
    """Rows per cell of fitted value × residual, with the residual spread per fitted-value bin."""
    counts = np.asarray(heat["counts"], dtype=float)
    fig = _figure(6.4, 3.0)
    with plt.rc_context(STYLE):
        ax = fig.subplots()
        shown = np.where(counts > 0, counts, np.nan).T
        if np.isfinite(shown).any():
            mesh = ax.pcolormesh(heat["fitted_edges"], heat["resid_edges"], shown, cmap="cividis",
                                 norm=LogNorm(vmin=1, vmax=max(np.nanmax(shown), 2)), shading="flat")
            fig.colorbar(mesh, ax=ax, label="rows", pad=0.01)
        fb = fitted_bins
        x = np.asarray(fb["x_mean"])
        sd = np.asarray(fb["resid_sd"])
        ax.plot(x, sd, color=AMBER, lw=1.2, label="± 1 sd per bin")
        ax.plot(x, -sd, color=AMBER, lw=1.2)
        ax.axhline(0, color="white", lw=0.6)
        ax.set_xlabel("fitted value")
        ax.set_ylabel("residual")
        ax.set_title("residuals against fitted values")
        ax.legend(frameon=False, fontsize=7, loc="upper right")
        fig.tight_layout()
    return fig


def residual_distribution(res: dict[str, Any]):
    """Histogram against the normal curve of the same spread, and the normal quantile comparison."""
    h = res["histogram"]
    edges = np.asarray(h["edges"])
    counts = np.asarray(h["counts"], dtype=float)
    width = np.diff(edges)
    total = res["n"]
    fig = _figure(6.4, 2.5)
    with plt.rc_context(STYLE):
        a1, a2 = fig.subplots(1, 2)
        a1.bar(edges[:-1], counts / (total * width), width=width, align="edge", color=TEAL, alpha=0.75, lw=0)
        xs = np.linspace(edges[0], edges[-1], 200)
        a1.plot(xs, norm_pdf(xs, 0, res["rmse"]), color=INK, lw=1, label="normal, same sd")
        a1.set_xlabel("residual")
        a1.set_title("residual distribution")
        a1.legend(frameon=False, fontsize=6.5)
        qq = res["normal_comparison"]
        a2.plot(qq["normal"], qq["residual"], "o", ms=2.5, color=TEAL)
        lim = [min(qq["normal"][0], qq["residual"][0]), max(qq["normal"][-1], qq["residual"][-1])]
        a2.plot(lim, lim, color=INK, lw=0.8)
        a2.set_xlabel("normal quantile")
        a2.set_ylabel("residual quantile")
        a2.set_title("quantiles against a normal")
        fig.tight_layout()
    return fig


def robust_ratios(terms: list[str], plain, estimators: dict[str, dict], selected: str):
    """Robust standard error over plain standard error, per term and estimator."""
    names = list(estimators)
    fig = _figure(6.4, 0.3 * len(terms) * max(1, len(names) / 3) + 1.0)
    with plt.rc_context(STYLE):
        ax = fig.subplots()
        y = np.arange(len(terms))
        h = 0.8 / len(names)
        for k, name in enumerate(names):
            r = np.asarray(estimators[name]["std_error"]) / np.asarray(plain)
            color = AMBER if name == selected else plt.cm.Greys(0.35 + 0.5 * k / max(len(names), 1))
            ax.barh(y + k * h - 0.4 + h / 2, r, height=h, color=color, label=name)
        ax.axvline(1.0, color=INK, lw=0.8)
        ax.set_yticks(y, terms)
        ax.invert_yaxis()
        ax.set_xlabel("robust std.err ÷ plain std.err")
        ax.set_title("how much the plain errors understate (> 1) or overstate (< 1) the uncertainty")
        ax.legend(frameon=False, fontsize=7, ncol=min(len(names), 5), loc="lower right")
        fig.tight_layout()
    return fig
