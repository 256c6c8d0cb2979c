"""Plots of a comparison: relative loss gap against passes and against seconds, log scale.

Drawn with matplotlib's Agg backend (no display needed) and written atomically as PNG and SVG.
"""

from __future__ import annotations

import os
from pathlib import Path

from tallfit.atomic import atomic_path

FLOOR = 1e-18  # gaps at or below this are drawn on the floor line (log scale has no zero)


def draw(doc: dict):
    """A matplotlib Figure of the comparison document (``compare.report.to_dict``)."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    fig = Figure(figsize=(11, 4.4), layout="constrained")
    axes = fig.subplots(1, 2, sharey=True)
    exact = doc["exact"]
    for ax, key, xlabel in ((axes[0], "passes", "passes over the data (first pass included)"),
                            (axes[1], "seconds", "wall time, s (first pass included)")):
        for s in doc["solvers"]:
            hist = s.get("history") or []
            if not hist:
                continue
            xs = [h[key] for h in hist]
            ys = [max(h["relative_gap"], FLOOR) for h in hist]
            ax.plot(xs, ys, marker="o", markersize=3, linewidth=1.4, label=s["solver"])
        ax.axvline(exact[key], color="black", linestyle="--", linewidth=1, label="exact fit")
        for t in doc["thresholds"]:
            ax.axhline(t, color="grey", linestyle=":", linewidth=0.8)
        ax.set_yscale("log")
        ax.set_xlabel(xlabel)
        ax.grid(True, which="major", alpha=0.3)
    axes[0].set_ylabel("relative training-loss gap to the exact optimum")
    axes[0].legend(loc="upper right", fontsize=8)
    fig.suptitle(f"{doc['target']}: iterative solvers against the exact fit ({doc['n_used']:,} rows)", fontsize=10)
    return fig


def save_plots(doc: dict, stem: str | os.PathLike) -> list[str]:
    """Write STEM.png and STEM.svg (each atomically); returns the paths written."""
    fig = draw(doc)
    written = []
    for fmt in ("png", "svg"):
        path = Path(f"{stem}.{fmt}")
        with atomic_path(path) as tmp:
            fig.savefig(tmp, format=fmt, dpi=120)
        written.append(str(path))
    return written
