"""Breusch–Pagan test in Koenker's studentised form, from second-pass sums.

Regress uᵢ = eᵢ² on the model's own terms; LM = n·R² of that regression is χ² with p − 1 degrees
of freedom when the noise variance does not change with the terms (Breusch & Pagan, Econometrica
47, 1979; Koenker, J. Econometrics 17, 1981, whose form does not assume normal errors). In the
orthonormal coordinates zᵢ = R11⁻ᵀxᵢ the explained sum of squares is ‖Σ zᵢuᵢ‖² less the
intercept's share, so one pass suffices: with an intercept first, ESS = ‖g[1:]‖² exactly, and
the total is the centred sum of squares of u, merged across blocks by Chan, Golub & LeVeque's
update (Am. Statistician 37, 1983), never by Σu² − (Σu)²/n.

With an absorbed key the terms are the rows centred on their level's means (``centred``): every
zᵢ column sums to zero, so the auxiliary regression on a constant and those terms has
ESS = ‖g‖² and p degrees of freedom (levels themselves are not among its regressors).
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
    n: float = 0  # rows (with frequency weights, their weight sum)
    mean: float = 0.0
    m2: float = 0.0  # Σ (uᵢ − ū)²
    centred: bool = False  # terms centred on an absorbed key's levels (no intercept column)

    @classmethod
    def create(cls, p: int, intercept: bool, centred: bool = False) -> "BreuschPaganSums":
        return cls(p, intercept, np.zeros(p), centred=centred)

    def add_squares(self, e: np.ndarray, w: np.ndarray | None = None) -> None:
        """Fold one block's uᵢ = eᵢ² into the centred sums (``g`` gets Σ zᵢuᵢ from
        kernels.tile_scores, in the same sweep as the sandwich scores); with frequency weights
        ``w`` each row stands for wᵢ rows (n is then Σw)."""
        m = len(e)
        if m == 0:
            return
        if w is None:
            mb, m2b = square_moments(e)
            self._combine(m, mb, m2b)
            return
        W = float(w.sum())
        if W > 0:
            u = e * e
            mb = float(w @ u) / W
            self._combine(W, mb, float(w @ (u - mb) ** 2))

    def _combine(self, m: float, mb: float, m2b: float) -> None:
        n = self.n + m
        delta = mb - self.mean
        self.m2 += m2b + delta * delta * self.n * m / n
        self.mean += delta * m / n
        self.n = n

    def merge(self, other: "BreuschPaganSums") -> "BreuschPaganSums":
        out = BreuschPaganSums(self.p, self.intercept, self.g + other.g, self.n, self.mean, self.m2, self.centred)
        if other.n:
            out._combine(other.n, other.mean, other.m2)
        return out

    def result(self) -> dict[str, Any] | None:
        """The test, or None without an intercept (the auxiliary regression needs a constant)."""
        n = self.n
        if self.centred:  # a constant beside the p centred terms: p + 1 coefficients
            df, k, ess = self.p, self.p + 1, float(self.g @ self.g)
        else:
            df, k, ess = self.p - 1, self.p, float(self.g[1:] @ self.g[1:])
        if not (self.intercept or self.centred) or df < 1:
            return None
        tss = self.m2
        r2 = ess / tss if tss > 0 else float("nan")
        lm = n * r2
        with np.errstate(divide="ignore", invalid="ignore"):
            f = (ess / df) / ((tss - ess) / (n - k)) if tss > ess else float("nan")
        return {
            "statistic": float(lm),
            "df": int(df),
            "p_value": float(chi2_sf(lm, df)) if df > 0 else float("nan"),
            "f_statistic": float(f),
            "f_p_value": float(f_sf(f, df, n - k)) if np.isfinite(f) else float("nan"),
            "r_squared_aux": float(r2),
            "form": "Koenker (studentised)",
        }
