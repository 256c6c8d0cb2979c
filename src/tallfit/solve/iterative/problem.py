"""The least-squares problem an iterative solver works on, and what one streamed pass computes.

Objective: f(b) = ‖Xb − y‖² / (2n) over the used rows (n of them), X the kept design columns.

Standardisation is a change of variable b = T c, with T built from the column means and
standard deviations (so Z = XT has centred, unit-variance feature columns beside the intercept;
without an intercept, columns are scaled to unit root mean square). Solvers work in c; every
streamed quantity is computed in b and carried over: ∇_c f = Tᵀ ∇_b f, Z v = X (T v). The means,
spreads and the spectrum of ZᵀZ come from the factor gathered in the first pass (AᵀA = RᵀR), so
no extra pass is spent on them.

A *pass* (:meth:`Problem.products`) streams every block once and returns, for a point x and
optional directions V (all in b), Xᵀ(Xx − y), ‖Xx − y‖², Xᵀ X V and ‖X V‖² column by column.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from dataclasses import dataclass

import numpy as np

from tallfit.kernels.sgd import gradient_products

BlockPass = Callable[[], Iterable[np.ndarray]]  # one pass: blocks A = [X_all | y] (Fortran float64)


@dataclass
class PassProducts:
    grad: np.ndarray  # Xᵀ(Xx − y)
    sse: float  # ‖Xx − y‖²
    hv: np.ndarray  # Xᵀ X V (p × k), k directions
    v_norms: np.ndarray  # ‖X V[:, j]‖²


class Problem:
    """Kept columns, the change of variable T and the Gram spectrum in the solver's variables."""

    def __init__(self, R: np.ndarray, keep: list[int], n: int, intercept: bool, standardize: bool) -> None:
        k = R.shape[0]
        self.keep = list(keep)
        self.all_kept = self.keep == list(range(k - 1))
        self.n = int(n)
        self.p = len(self.keep)
        self.intercept = bool(intercept)
        self.standardize = bool(standardize)
        gram = R[:, self.keep].T @ R[:, self.keep]  # XᵀX of the kept columns (p × p, small)
        self.T = self._transform(gram) if standardize else np.eye(self.p)
        self.penalized = np.ones(self.p)
        if self.intercept:
            self.penalized[0] = 0.0
        # Spectrum of ZᵀZ / n from the factor: Z = XT, and ‖XT v‖ = ‖R[:, keep] T v‖.
        s = np.linalg.svd(R[:, self.keep] @ self.T, compute_uv=False)
        eig = s**2 / self.n
        self.lipschitz = float(eig[0]) if eig.size else 1.0
        self.strong = float(eig[-1]) if eig.size else 1.0
        self.trace = float(np.sum(eig))

    def _transform(self, gram: np.ndarray) -> np.ndarray:
        n, p = self.n, self.p
        T = np.eye(p)
        first = 1 if self.intercept else 0
        for j in range(first, p):
            if self.intercept:
                mean = gram[0, j] / n
                var = max(gram[j, j] / n - mean * mean, 0.0)
            else:
                mean, var = 0.0, gram[j, j] / n
            sd = np.sqrt(var) if var > 0 else 1.0
            T[j, j] = 1.0 / sd
            if self.intercept:
                T[0, j] = -mean / sd
        return T

    # -- standardisation for row-wise kernels: z = (x − shift) · inv_scale ---------------------
    @property
    def shift(self) -> np.ndarray:
        if not self.intercept:
            return np.zeros(self.p)
        out = np.zeros(self.p)
        d = np.diagonal(self.T)
        out[1:] = -self.T[0, 1:] / d[1:]
        return out

    @property
    def inv_scale(self) -> np.ndarray:
        return np.diagonal(self.T).copy()

    def to_b(self, c: np.ndarray) -> np.ndarray:
        return self.T @ c

    def to_c(self, b: np.ndarray) -> np.ndarray:
        return np.linalg.solve(self.T, b)

    # -- one pass ---------------------------------------------------------------------------
    def design(self, A: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """X (kept columns, Fortran) and y of a block."""
        X = A[:, : A.shape[1] - 1] if self.all_kept else np.asfortranarray(A[:, self.keep])
        return X, A[:, -1]

    def products(self, blocks: Iterable[np.ndarray], x: np.ndarray, V: np.ndarray | None = None) -> PassProducts:
        """Stream one pass: gradient sums at x (in b) and Gram products with the columns of V."""
        k = 0 if V is None else V.shape[1]
        W = np.empty((self.p, 1 + k), order="F")
        W[:, 0] = x
        if k:
            W[:, 1:] = V
        G = np.zeros((self.p, 1 + k))
        ss = np.zeros(1 + k)
        for A in blocks:
            X, y = self.design(A)
            gradient_products(X, y, W, G, ss)
        return PassProducts(grad=G[:, 0], sse=float(ss[0]), hv=G[:, 1:], v_norms=ss[1:])


class Monitor:
    """Exact training loss (and holdout loss) of any coefficient vector, from factors; no pass.

    ‖Xb − y‖² = ‖R11 b − r12‖² + ρ² for the reduced factor of the kept columns, so the gap to the
    optimum is ‖R11 b − r12‖² itself, free of cancellation. A holdout factor H (any triangular
    factor of [X_h | y_h] over all design columns) gives ‖X_h b − y_h‖² = ‖H w‖², w = [b; −1]
    placed at the kept columns.
    """

    def __init__(self, R11, r12, rho, beta, keep, k, holdout_R: np.ndarray | None = None, holdout_n: int = 0):
        self.R11, self.r12, self.rho = R11, r12, float(rho)
        self.beta = np.asarray(beta, dtype=float)
        self.keep, self.k = list(keep), int(k)
        self.holdout_R, self.holdout_n = holdout_R, int(holdout_n)
        self.optimum = self.rho**2

    def gap(self, b: np.ndarray) -> float:
        d = self.R11 @ b - self.r12
        return float(d @ d)

    def sse(self, b: np.ndarray) -> float:
        return self.gap(b) + self.optimum

    def relative_gap(self, b: np.ndarray) -> float:
        """Gap over the optimal RSS (over ‖y‖² when the optimum is an exact fit)."""
        scale = self.optimum if self.optimum > 0 else float(self.r12 @ self.r12)
        return self.gap(b) / scale if scale > 0 else self.gap(b)

    def coef_error(self, b: np.ndarray) -> float:
        """‖b − β̂‖ / ‖β̂‖ (2-norm; absolute when β̂ = 0)."""
        nb = float(np.linalg.norm(self.beta))
        err = float(np.linalg.norm(b - self.beta))
        return err / nb if nb > 0 else err

    def holdout_mse(self, b: np.ndarray) -> float | None:
        if self.holdout_R is None or self.holdout_n == 0:
            return None
        w = np.zeros(self.k)
        w[self.keep] = b
        w[-1] = -1.0
        r = self.holdout_R @ w
        return float(r @ r) / self.holdout_n
