"""Breusch–Pagan test in Koenker's studentised form, from second-pass sums.

Regress uᵢ = eᵢ² on the model's own terms; LM = n·R² of that regression is χ² with p − 1 degrees
of freedom when the noise variance does not change with the terms (Breusch & Pagan, Econometrica
47, 1979; Koenker, J. Econometrics 17, 1981, whose form does not assume normal errors). In the
orthonormal coordinates zᵢ = R11⁻ᵀxᵢ the explained sum of squares is ‖Σ zᵢuᵢ‖² less the
intercept's share, so one pass suffices: with an intercept first, ESS = ‖g[1:]‖² exactly, and
the total is the centred sum of squares of u, merged across blocks by Chan, Golub & LeVeque's
update (Am. Statistician 37, 1983), never by Σu² − (Σu)²/n.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from tallfit.diagnostics.kernels import square_moments
from tallfit.solve.distributions import chi2_sf, f_sf


@dataclass
class BreuschPaganSums:
    p: int
    intercept: bool
    g: np.ndarray  # Σ zᵢ uᵢ
    n: int = 0
    mean: float = 0.0
    m2: float = 0.0  # Σ (uᵢ − ū)²

    @classmethod
    def create(cls, p: int, intercept: bool) -> "BreuschPaganSums":
        return cls(p, intercept, np.zeros(p))

    def add_squares(self, e: np.ndarray) -> None:
        """Fold one block's uᵢ = eᵢ² into the centred sums (``g`` gets Σ zᵢuᵢ from
        kernels.tile_scores, in the same sweep as the sandwich scores)."""
        m = len(e)
        if m == 0:
            return
        mb, m2b = square_moments(e)
        self._combine(m, mb, m2b)

    def _combine(self, m: int, mb: float, m2b: float) -> None:
        n = self.n + m
        delta = mb - self.mean
        self.m2 += m2b + delta * delta * self.n * m / n
        self.mean += delta * m / n
        self.n = n

    def merge(self, other: "BreuschPaganSums") -> "BreuschPaganSums":
        out = BreuschPaganSums(self.p, self.intercept, self.g + other.g, self.n, self.mean, self.m2)
        if other.n:
            out._combine(other.n, other.mean, other.m2)
        return out

    def result(self) -> dict[str, Any] | None:
        """The test, or None without an intercept (the auxiliary regression needs a constant)."""
        n, p = self.n, self.p
        if not self.intercept or p < 2:
            return None
        ess = float(self.g[1:] @ self.g[1:])
        tss = self.m2
        df_model = p - 1
        r2 = ess / tss if tss > 0 else float("nan")
        lm = n * r2
        df = p - 1
        with np.errstate(divide="ignore", invalid="ignore"):
            f = (ess / df_model) / ((tss - ess) / (n - p)) if df_model > 0 and tss > ess else float("nan")
        return {
            "statistic": float(lm),
            "df": int(df),
            "p_value": float(chi2_sf(lm, df)) if df > 0 else float("nan"),
            "f_statistic": float(f),
            "f_p_value": float(f_sf(f, df_model, n - p)) if np.isfinite(f) else float("nan"),
            "r_squared_aux": float(r2),
            "form": "Koenker (studentised)",
        }
