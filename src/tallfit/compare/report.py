"""The comparison as figures: per-solver milestones, a one-line reading, text and JSON.

Milestones: the first recorded iterate whose relative training-loss gap (gap / RSS of the exact
fit) is at or below each threshold, with the passes and seconds it took (the first pass
included), or "not reached".
"""

from __future__ import annotations

from typing import Any

from tallfit.compare.run import Comparison, SolverRun
from tallfit.render.numbers import count, sig


def _key(threshold: float) -> str:
    return f"{threshold:.0e}"


def milestones(run: SolverRun, thresholds) -> dict[str, dict | None]:
    out: dict[str, dict | None] = {}
    steps = run.run.history.steps if run.run is not None else []
    for thr in thresholds:
        hit = next((s for s in steps if s.relative_gap <= thr), None)
        out[_key(thr)] = None if hit is None else {"passes": hit.passes, "seconds": hit.seconds}
    return out


def reading(run: SolverRun, cmp: Comparison) -> str:
    """One plain sentence on what the run achieved against the exact fit."""
    if run.run is None:
        return f"{run.label} diverged and gave no answer ({run.error.split(';')[0]})"
    r = run.run
    last = r.history.steps[-1]
    exact = f"the exact fit took 1 pass and {cmp.exact_seconds:.2f} s"
    tightest = min(cmp.thresholds)
    hit = milestones(run, [tightest])[_key(tightest)]
    if hit is not None:
        ratio = hit["seconds"] / cmp.exact_seconds if cmp.exact_seconds > 0 else float("inf")
        return (f"{r.solver} came within {tightest:g} of the least-squares loss after {hit['passes']} passes "
                f"and {hit['seconds']:.2f} s, {ratio:.1f}× the time of the exact fit (1 pass)")
    return (f"{r.solver} stopped {last.relative_gap:.1e} above the least-squares loss after {last.passes} passes "
            f"and {last.seconds:.2f} s ({r.stop_reason}); {exact}")


def to_dict(cmp: Comparison) -> dict[str, Any]:
    """The JSON document of the comparison (the same figures as the table and plots)."""
    ex = cmp.exact
    solvers = []
    for run in cmp.runs:
        entry: dict[str, Any] = {"solver": run.name, "label": run.label, "reading": reading(run, cmp),
                                 "reached": milestones(run, cmp.thresholds)}
        if run.run is None:
            entry.update(status="diverged", error=run.error)
        else:
            last = run.run.history.steps[-1]
            entry.update(run.run.to_dict())
            entry.update(status="ok", final_relative_gap=last.relative_gap, final_loss_gap=last.loss_gap,
                         final_coef_error=last.coef_error, final_holdout_mse=last.holdout_mse,
                         passes=last.passes, seconds=last.seconds)
        solvers.append(entry)
    return {
        "target": ex.spec.target,
        "terms": list(ex.terms),
        "n_used": int(ex.inference.n_used),
        "source": ex.source,
        "condition_number": ex.condition_number,
        "exact": {"solver": ex.solver, "passes": 1, "seconds": cmp.exact_seconds, "rss": ex.inference.rss,
                  "holdout_mse": cmp.exact_holdout_mse, "coef": ex.coef},
        "gap_definition": "relative gap = (‖Xb − y‖² − RSS) / RSS, RSS of the exact fit, computed exactly "
                          "from the factor; coef error = ‖b − β̂‖ / ‖β̂‖",
        "thresholds": list(cmp.thresholds),
        "holdout": cmp.holdout,
        "cache": cmp.cache,
        "solvers": solvers,
    }


def _cell(m: dict | None) -> str:
    return "not reached" if m is None else f"{m['passes']} / {m['seconds']:.2f}s"


def render_text(cmp: Comparison) -> str:
    """The table: passes / seconds to each gap, final gap and coefficient error, and readings."""
    ex = cmp.exact
    head = [f"compare ▸ {ex.spec.target} on {len(ex.terms)} terms, {count(ex.inference.n_used)} rows "
            f"(scaled condition number {sig(ex.condition_number, 3)})",
            f"exact fit: 1 pass, {cmp.exact_seconds:.2f} s, RSS {sig(ex.inference.rss, 8)}"
            + (f", holdout MSE {sig(cmp.exact_holdout_mse, 6)}" if cmp.exact_holdout_mse is not None else ""),
            "gap = training loss above the exact optimum, relative to its RSS; passes / seconds include the first pass"]
    cols = ["solver"] + [f"gap ≤ {t:g}" for t in cmp.thresholds] + ["final gap", "coef error", "passes"]
    if cmp.holdout:
        cols.append("holdout MSE")
    rows = []
    for run in cmp.runs:
        ms = milestones(run, cmp.thresholds)
        row = [run.name] + [_cell(ms[_key(t)]) for t in cmp.thresholds]
        if run.run is None:
            row += ["diverged", "—", "—"] + (["—"] if cmp.holdout else [])
        else:
            last = run.run.history.steps[-1]
            row += [f"{last.relative_gap:.1e}", f"{last.coef_error:.1e}", str(last.passes)]
            if cmp.holdout:
                row.append(sig(last.holdout_mse, 6))
        rows.append(row)
    widths = [max(len(r[i]) for r in [cols] + rows) for i in range(len(cols))]
    fmt = lambda r: "  " + "  ".join(c.ljust(w) if i == 0 else c.rjust(w) for i, (c, w) in enumerate(zip(r, widths)))
    lines = head + ["", fmt(cols), "  " + "  ".join("·" * w for w in widths)] + [fmt(r) for r in rows]
    lines += ["", "reading"] + [f"  · {reading(run, cmp)}" for run in cmp.runs]
    if cmp.cache.get("status") not in (None, "not requested"):
        c = cmp.cache
        size = f", {c['bytes'] / 1e6:.1f} MB at {c['path']}" if "bytes" in c else ""
        lines.append(f"cache     {c['status']}{size}")
    return "\n".join(lines) + "\n"
