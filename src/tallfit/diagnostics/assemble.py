"""From the second pass's sums to the diagnostics a report shows (a JSON-ready dict)."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from tallfit.diagnostics.advice import advice
from tallfit.diagnostics.curvature import line_test

if TYPE_CHECKING:  # the pass hands its sums up; nothing here imports the engine
    from tallfit.engine.second_pass import SecondPass
    from tallfit.results import FitResult

SAME_DATA_TOL = 1e-6  # max |Σ zᵢeᵢ|/‖e‖: ~1e-13 on the fitting data, order 1 on other data


def same_data(model: "FitResult", sp: "SecondPass") -> bool:
    """Whether the pass read the rows the model was fitted on (normal equations hold, counts agree;
    rows of one-row absorbed levels, which the fit matches exactly, are left out of the pass;
    with frequency weights the counts are of the rows the weighted rows stand for)."""
    spec = model.spec
    n = sp.n_used
    if spec.weights and spec.weight_kind == "frequency" and sp.sandwich is not None:
        n = int(round(sp.sandwich.n))
    if n + sp.rows_exact != model.inference.n_used:
        return False
    exact = model.solver.startswith("householder")  # an iterative solution leaves Σ zᵢeᵢ ≠ 0
    return not exact or sp.sandwich.normal_equations_residual() < SAME_DATA_TOL


def _heat(sp: "SecondPass") -> dict[str, Any]:
    ax = sp.heat_axes
    c = ax["cells"]
    inner = sp.heat[1 : c + 1, 1 : c + 1]
    return {
        "counts": inner.tolist(),
        "fitted_edges": (ax["fitted_lo"] + np.arange(c + 1) / ax["fitted_scale"]).tolist(),
        "resid_edges": (ax["resid_lo"] + np.arange(c + 1) / ax["resid_scale"]).tolist(),
        "outside": int(sp.heat.sum() - inner.sum()),
    }


def build_diagnostics(model: "FitResult", sp: "SecondPass", bins: int = 20, robust: dict | None = None) -> dict[str, Any]:
    """Binned residuals per feature and fitted value, curvature flags, the residual distribution,
    Breusch–Pagan, the largest rows, and advice."""
    s = model.inference.residual_std
    coef = model.coef
    features = []
    for j, name in enumerate(sp.features):
        b = sp.feature_bins.coarsen(j, bins)
        features.append({
            "name": name,
            "coef": coef[name],
            "bins": b.to_dict(),
            "partial_residual": b.partial_residual(coef[name]).tolist(),
            "curvature": line_test(b, s, tests=len(sp.features)),
        })
    fb = sp.fitted_bins.coarsen(0, bins)
    sd = fb.resid_sd[(fb.count >= 30) & np.isfinite(fb.resid_sd)]
    ratio = float(sd.max() / sd.min()) if sd.size >= 2 and sd.min() > 0 else float("nan")
    same = same_data(model, sp)
    res = sp.residuals
    diag: dict[str, Any] = {
        "n_read": int(sp.n_read),
        "n_used": int(sp.n_used),
        "dropped_by_column": dict(sp.dropped_by_column),
        "same_data": same,
        "features": features,
        "fitted": {"bins": fb.to_dict(), "spread_ratio": ratio},
        "heat": _heat(sp),
        "residuals": {**res.summary(), "histogram": res.histogram(), "normal_comparison": res.normal_comparison()},
        "breusch_pagan": sp.breusch_pagan.result() if same else None,
        "top_residuals": sp.top_residuals.to_list(),
        "top_leverage": sp.top_leverage.to_list(),
    }
    diag["advice"] = advice(diag, robust)
    return diag
