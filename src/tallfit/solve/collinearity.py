"""Collinearity and relative importance from the factor: VIF, scaled condition, standardised effects.

With an intercept, R22 = R[1:p, 1:p] is the factor of the centred features (NUMERICS.md), so
for feature j

    VIF_j = 1 / (1 − R²_j) = [C⁻¹]_jj · C_jj = ‖R22⁻ᵀ e_j‖² · ‖R22 e_j‖²,   C = R22ᵀ R22,

R²_j being that of x_j regressed on the other features and a constant (Marquardt, Technometrics
12, 1970). Without an intercept the same formula on the uncentred factor gives the uncentred
VIF, as statsmodels' ``variance_inflation_factor`` computes it for a design without a constant.
The condition number is that of the centred design with unit-length columns (R22 scaled by its
column norms; uncentred when there is no intercept). Standardised estimates are β_j s_j / s_y:
the change in the target, in its standard deviations, per standard deviation of the feature
(needs the means, hence an intercept). With an absorbed key the factor is that of the rows
centred on their level's means, so the same formulas give the within-level VIFs (x_j on the other
features and the levels) and standardised effects in within-level standard deviations. Warning thresholds are common practice (no published
source): VIF above 10 and a scaled condition number above 30.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.linalg import solve_triangular

VIF_WARN = 10.0  # common practice
CONDITION_WARN = 30.0  # common practice


@dataclass
class Collinearity:
    terms: list[str]  # the features described (the intercept excluded)
    vif: np.ndarray
    std_estimate: np.ndarray | None  # None without an intercept
    condition: float
    centred: bool
    warnings: list[str] = field(default_factory=list)

    def to_dict(self) -> dict:
        return {
            "condition_number_standardised": self.condition,
            "centred": self.centred,
            "vif": {t: float(v) for t, v in zip(self.terms, self.vif)},
            "std_estimate": None if self.std_estimate is None else
            {t: float(v) for t, v in zip(self.terms, self.std_estimate)},
            "thresholds": {"vif": VIF_WARN, "condition_number": CONDITION_WARN, "source": "common practice"},
            "warnings": list(self.warnings),
        }


def collinearity(Rk: np.ndarray, terms: list[str], beta: np.ndarray, intercept: bool, n: int,
                 within: bool = False) -> Collinearity:
    """From the factor Rk of [X_kept | y] (kept terms in order, the intercept first when present;
    ``within``: the factor of rows centred on an absorbed key's levels, centred already)."""
    p = Rk.shape[0] - 1
    first = 1 if intercept else 0
    centred = intercept or within
    F = Rk[first:p, first:p]
    names = list(terms[first:p])
    if F.shape[0] == 0:
        return Collinearity(names, np.zeros(0), np.zeros(0) if centred else None, 1.0, centred)
    col = np.linalg.norm(F, axis=0)
    inv = solve_triangular(F, np.eye(F.shape[0]))
    vif = np.einsum("ij,ij->i", inv, inv) * col**2
    s = np.linalg.svd(F / np.where(col > 0, col, 1.0), compute_uv=False)
    cond = float(s[0] / s[-1]) if s[-1] > 0 else float("inf")
    std = None
    if centred and n > 1:
        sd_y = np.linalg.norm(Rk[first:, p])
        std = beta[first:p] * col / sd_y if sd_y > 0 else np.full(len(names), np.nan)
    warnings = []
    high = [f"{t} {v:.3g}" for t, v in zip(names, vif) if v > VIF_WARN]
    if high:
        warnings.append(
            f"variance inflation above {VIF_WARN:g} (common practice) for {', '.join(high)}: these terms "
            "are nearly combinations of the others, so their separate estimates are unstable"
        )
    if cond > CONDITION_WARN:
        warnings.append(
            f"the standardised design has condition number {cond:.3g} (above {CONDITION_WARN:g}, common "
            "practice): nearly collinear features; consider dropping or combining some, or ridge"
        )
    return Collinearity(names, vif, std, cond, centred, warnings)
