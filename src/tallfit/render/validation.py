"""The human report of a validation run, and the coefficient-path plot (matplotlib, Agg)."""

from __future__ import annotations

import os

import numpy as np

from tallfit.render.numbers import count, pval, sig, table as _table
from tallfit.render.summary import RULE

PLOT_FORMATS = ("png", "svg")


def _split_line(report) -> str:
    s = report.split
    parts = []
    if s["holdout"] > 0:
        parts.append(f"holdout {s['holdout']:.0%} by {s['holdout_key'] or 'row position'}")
    if s["folds"]:
        parts.append(f"{s['folds']} folds by {s['fold_key'] or 'row position'}")
    return " · ".join(parts + [f"seed {s['seed']}"])


def _ridge_lines(rr) -> list[str]:
    out = ["", f"ridge     {len(rr.penalties)} penalties {sig(rr.penalties[0], 3)} … {sig(rr.penalties[-1], 3)}"
           " on standardised features, intercept unpenalised"]
    if rr.cv_mean is not None:
        for label, i in (("least CV error", rr.best), ("one-SE rule", rr.one_se)):
            out.append(f"          {label:15} penalty {sig(rr.penalties[i], 4)} · effective df "
                       f"{rr.df[i]:.2f} · CV MSE {sig(rr.cv_mean[i], 6)} ± {sig(rr.cv_se[i], 3)}")
    if rr.holdout_mse is not None and rr.chosen is not None:
        c = rr.chosen
        out.append(f"          chosen penalty {sig(rr.penalties[c], 4)}: holdout MSE {sig(rr.holdout_mse[c], 6)}")
    if rr.chosen is not None:
        c = rr.chosen
        rows = [("term", "ridge estimate", "unpenalised")]
        for i, t in enumerate(rr.terms):
            rows.append((t, sig(rr.coef[c, i], 7), sig(rr.coef[0, i], 7)))
        out.extend(_table(rows))
        out.append(f"          ('unpenalised' is the smallest penalty on the path, {sig(rr.penalties[0], 3)})")
    return out


def _terms(names: list[str]) -> list[str]:
    """Column names as model terms: a categorical's indicator columns "col[level]" read as "col"."""
    out: list[str] = []
    for n in names:
        term = n.split("[", 1)[0] if n.endswith("]") and "[" in n else n
        if term not in out:
            out.append(term)
    return out


def _selection_lines(sel) -> list[str]:
    out = ["", f"selection {sel.method} by {sel.criterion}"
           + (f" · {count(sel.nodes)} subsets examined" if sel.nodes else "")]
    crit = sel.criterion
    rows = [("terms", "RSS", "AIC", "BIC", "adj. R²") + (("CV MSE",) if "cv" in sel.steps[0] else ())]
    for st in sel.steps:
        names = _terms([t for t in st["terms"] if t != "(intercept)"])
        label = ", ".join(names) if names else "(intercept only)"
        if len(label) > 44:
            label = f"{len(names)} terms: " + label[: 30] + "…"
        row = (label, sig(st["rss"], 7), sig(st["aic"], 8), sig(st["bic"], 8), f"{st['adj_r2']:.5f}")
        rows.append(row + ((sig(st["cv"], 6),) if "cv" in st else ()))
    out.extend(_table(rows))
    chosen = _terms([t for t in sel.chosen if t != "(intercept)"])
    out.append(f"          chosen ({crit}): {', '.join(chosen) if chosen else 'intercept only'}")
    if sel.excluded:
        out.append(f"          left out as combinations of other terms: {', '.join(sel.excluded)}")
    return out


def render_validation(report) -> str:
    fit = report.fit
    inf = fit.inference
    head = f"tallfit ▸ validating {fit.spec.target} on {len(fit.terms)} terms"
    out = [head, RULE, f"split     {_split_line(report)}",
           f"rows      {count(report.n_read)} read · {count(inf.n_used)} used for training"
           + (f" · {count(report.holdout.n)} held out" if report.holdout else "")]
    out.append("")
    out.append(f"training  MSE {sig(inf.rss / inf.n_used, 6)} · R² {inf.r_squared:.6f} "
               "(on the rows fitted: always optimistic)")
    if report.cv is not None:
        cv = report.cv
        out.append(f"k-fold    CV MSE {sig(cv.mean, 6)} ± {sig(cv.se, 3)} (mean of {cv.fold_mse.size} folds ± SE) · "
                   f"RMSE {sig(np.sqrt(cv.mean), 5)} · pooled {sig(cv.pooled, 6)}")
        rows = [("fold", "rows", "MSE")] + [(str(j + 1), count(int(n)), sig(m, 6))
                                              for j, (n, m) in enumerate(zip(cv.fold_n, cv.fold_mse))]
        out.extend(_table(rows))
    if report.holdout is not None:
        h = report.holdout.to_dict()
        mae = "" if h["mae"] is None else f" · MAE {sig(h['mae'], 6)}"
        out.append(f"holdout   MSE {sig(h['mse'], 6)} · RMSE {sig(h['rmse'], 5)} · R² {h['r_squared']:.6f}{mae}")
    if report.ridge is not None:
        out.extend(_ridge_lines(report.ridge))
    if report.selection is not None:
        out.extend(_selection_lines(report.selection))
    if report.nested:
        out.append("")
        out.append("nested F tests: do these terms help, given the others?")
        for t in report.nested:
            out.append(f"  + {', '.join(t['added'])}: F {sig(t['f_statistic'], 6)} on {t['df_base'] - t['df_full']} "
                       f"and {count(t['df_full'])} df, p {pval(t['p_value'])}")
    notes = list(report.notes) + list(fit.warnings)
    if notes:
        out.append("")
        out.append("notes")
        out.extend(f"  ! {n}" for n in notes)
    out.append("")
    out.append("read with care")
    out.extend(f"  · {c}" for c in report.cautions)
    return "\n".join(out) + "\n"


def plot_coefficient_path(ridge, path: str | os.PathLike) -> None:
    """Standardised coefficient paths (and CV error when present) against the penalty, PNG or SVG."""
    from pathlib import Path

    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from tallfit.atomic import atomic_path
    from tallfit.errors import OutputError

    fmt = Path(path).suffix.lower().lstrip(".")
    if fmt not in PLOT_FORMATS:
        raise OutputError(f"plot {str(path)!r}: give a .png or .svg file name")
    panels = 2 if ridge.cv_mean is not None else 1
    fig, axes = plt.subplots(panels, 1, figsize=(7.5, 3.6 * panels), sharex=True, squeeze=False)
    ax = axes[0, 0]
    for i, term in enumerate(ridge.terms[1:], start=1):
        y = ridge.coef[:, i] * ridge.scales[i - 1]
        ax.plot(ridge.penalties, y, label=term, linewidth=1.2)
    ax.set_xscale("log")
    ax.axhline(0.0, color="0.6", linewidth=0.8)
    ax.set_ylabel("estimate × feature sd")
    ax.set_title("ridge coefficient paths")
    if len(ridge.terms) <= 13:
        ax.legend(fontsize=7, ncol=2, frameon=False)
    for i, style in ((ridge.best, "--"), (ridge.one_se, ":")):
        if i is not None:
            for a in axes[:, 0]:
                a.axvline(ridge.penalties[i], color="0.3", linestyle=style, linewidth=0.9)
    if panels == 2:
        ax2 = axes[1, 0]
        ax2.errorbar(ridge.penalties, ridge.cv_mean, yerr=ridge.cv_se, fmt="o-", markersize=2.5, linewidth=1.0,
                     elinewidth=0.6, capsize=0)
        ax2.set_xscale("log")
        ax2.set_ylabel("CV mean squared error")
    axes[-1, 0].set_xlabel("penalty (on standardised features)")
    fig.tight_layout()
    with atomic_path(path) as tmp:
        fig.savefig(tmp, format=fmt)
    plt.close(fig)
