"""The Gram fast path: shifted co-moments of [x | y], merged pairwise, turned into a factor.

Speed against accuracy. The Householder factor (tsqr.py) loses about ε·κ of relative accuracy in
the coefficients, κ the condition number of the (column-scaled) design. Any method that forms
the cross-product matrix loses ε·κ², whatever care is taken in summing: with κ = 10³ that is
still 9-10 digits, with κ = 10⁶ (a degree-8 polynomial, NIST's Wampler and Filip sets) nothing
is left. What care *can* avoid is the extra loss of the naive computational formula
Σaaᵀ − n·āāᵀ, which cancels catastrophically when a column's mean is large against its spread
(power in watts, fan speed in rpm). So:

- every worker subtracts a fixed shift c (the mean of its first rows) before summing, so the
  sums are of values of the size of the spread, not the mean (Chan, Golub & LeVeque, "Algorithms
  for computing the sample variance", The American Statistician 37, 1983);
- two states merge by the pairwise update M = M_a + M_b + (n_a n_b / n) δδᵀ, δ = x̄_b − x̄_a
  (same paper), so worker count and order change only rounding;
- the centred co-moment M and the means give the triangular factor the solvers expect:
  with an intercept R = [[√n, √n·x̄ᵀ], [0, chol(M)]], since R'R = [[n, n x̄ᵀ], [n x̄, M + n x̄x̄ᵀ]];
  without one, R = triu(qr([chol(M); √n·x̄ᵀ])).

The accuracy estimate (``comoment_digits``) perturbs M at the size of its own rounding error
(ε·q·√(M_ii M_jj) per entry, a few fixed-seed trials) and measures how far each coefficient
moves: that is the ε·κ² loss measured instead of bounded. Below ``SAFE_DIGITS`` the Gram result
is called unsafe and the stable path should be used.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg import LinAlgError, cho_factor, cho_solve, cholesky, qr

from tallfit.kernels.products import gram, shifted_sums

EPS = np.finfo(np.float64).eps
#: Fewer estimated digits than this and the Gram result is unsafe (common practice: single precision
#: keeps about 7, so a float64 method that keeps fewer than 8 has lost more than half its digits).
SAFE_DIGITS = 8.0
SHIFT_ROWS = 4096  # rows whose mean becomes the shift


@dataclass
class CoMoments:
    """n, a shift c, Σ(a − c) and Σ(a − c)(a − c)ᵀ over the rows seen (q columns)."""

    q: int
    n: int = 0
    shift: np.ndarray | None = None
    sums: np.ndarray | None = None
    G: np.ndarray | None = None

    @classmethod
    def create(cls, q: int) -> "CoMoments":
        return cls(q=q, n=0, shift=None, sums=np.zeros(q), G=np.zeros((q, q)))

    def update(self, B: np.ndarray) -> None:
        """Add the rows of B (m × q, contiguous columns)."""
        m = B.shape[0]
        if m == 0:
            return
        if B.shape[1] != self.q:
            raise ValueError(f"block has {B.shape[1]} columns, co-moments have {self.q}")
        if self.shift is None:
            self.shift = B[: min(m, SHIFT_ROWS)].mean(axis=0)
        self.add_rows(B, 0)

    def add_rows(self, A: np.ndarray, first: int) -> None:
        """Add A's rows shifted by ``self.shift`` in columns ``first``…; columns before ``first`` are
        all ones (the intercept; ``first`` is 0 or 1), so with one the same product gives Σ(a − c)
        beside Σ(a − c)(a − c)ᵀ. A is left unchanged (kernels.products.shifted_gram shifts in
        registers: no sweep of the block to shift it, and ≈ 3× faster than BLAS syrk here)."""
        m, k = A.shape
        if m == 0:
            return
        s = np.zeros(k)
        s[first:] = self.shift
        P = np.zeros((k, k))
        gram(A, s, out=P)
        if first:
            self.G += P[1:, 1:]
            self.sums += P[0, 1:]
        else:
            self.G += P
            shifted_sums(A, s, self.sums)
        self.n += m

    def mean(self) -> np.ndarray:
        if self.n == 0:
            return np.zeros(self.q)
        return self.shift + self.sums / self.n

    def centred(self) -> np.ndarray:
        """M = Σ(a − ā)(a − ā)ᵀ, symmetric."""
        if self.n == 0:
            return np.zeros((self.q, self.q))
        M = self.G - np.outer(self.sums, self.sums) / self.n
        return (M + M.T) * 0.5

    def merge(self, other: "CoMoments") -> "CoMoments":
        """The co-moments of the union of the rows (pairwise formula); neither input is changed."""
        if other.q != self.q:
            raise ValueError("cannot merge co-moments of different widths")
        if other.n == 0:
            return self.copy()
        if self.n == 0:
            return other.copy()
        na, nb = self.n, other.n
        n = na + nb
        ma, mb = self.mean(), other.mean()
        delta = mb - ma
        M = self.centred() + other.centred() + (na * nb / n) * np.outer(delta, delta)
        mean = ma + delta * (nb / n)
        return CoMoments(q=self.q, n=n, shift=mean, sums=np.zeros(self.q), G=M)

    def copy(self) -> "CoMoments":
        return CoMoments(self.q, self.n, None if self.shift is None else self.shift.copy(),
                         self.sums.copy(), self.G.copy())


def _root(M: np.ndarray) -> np.ndarray:
    """Upper-triangular S with SᵀS = M: Cholesky, or for a singular M a QR of its eigen-root."""
    q = M.shape[0]
    if q == 0:
        return np.zeros((0, 0))
    try:
        return cholesky(M, lower=False, check_finite=True)
    except LinAlgError:
        w, V = np.linalg.eigh(M)
        S = np.sqrt(np.clip(w, 0.0, None))[:, None] * V.T
        return np.triu(qr(S, mode="r")[0])[:q]


def factor_from_comoments(cm: CoMoments, intercept: bool) -> np.ndarray:
    """The k × k upper-triangular factor of [1 | x | y] (k = q + 1) or of [x | y] (k = q)."""
    q = cm.q
    mean, M = cm.mean(), cm.centred()
    root = _root(M)
    rn = np.sqrt(float(cm.n))
    if intercept:
        R = np.zeros((q + 1, q + 1))
        R[0, 0] = rn
        R[0, 1:] = rn * mean
        R[1:, 1:] = root
        return R
    stacked = np.vstack([root, rn * mean[None, :]])
    return np.triu(qr(stacked, mode="r")[0])[:q]


def comoment_digits(cm: CoMoments, keep: list[int], intercept: bool, trials: int = 6) -> np.ndarray:
    """Estimated significant digits of each kept coefficient of the Gram solution (see module doc).

    ``keep`` indexes the design columns (intercept first when present) that the solver kept.
    """
    M = cm.centred()
    q = cm.q
    mean = cm.mean()
    first = 1 if intercept else 0
    feats = [j - first for j in keep if j >= first]  # kept feature columns, 0-based in M
    if not feats:
        return np.full(len(keep), 15.9)
    if not intercept:  # solve from the raw cross products, the matrix the Gram path really factors
        M = M + cm.n * np.outer(mean, mean)
    idx = feats + [q - 1]
    S = M[np.ix_(idx, idx)]
    scale = np.sqrt(np.clip(np.diagonal(S), np.finfo(float).tiny, None))

    def solve(Sm):
        p = len(feats)
        try:
            c = cho_factor(Sm[:p, :p], check_finite=False)
            b = cho_solve(c, Sm[:p, p], check_finite=False)
        except (LinAlgError, ValueError):
            return None
        if not np.all(np.isfinite(b)):
            return None
        if intercept:
            return np.concatenate([[mean[q - 1] - mean[feats] @ b], b])
        return b

    base = solve(S)
    if base is None:
        return np.zeros(len(keep))
    rng = np.random.default_rng(20261202)
    worst = np.zeros(base.size)
    size = EPS * len(idx) * np.outer(scale, scale)
    for _ in range(trials):
        Z = rng.standard_normal(S.shape)
        Z = (Z + Z.T) * 0.5
        b = solve(S + size * Z)
        if b is None:
            return np.zeros(len(keep))
        ref = np.where(base != 0, np.abs(base), 1.0)
        worst = np.maximum(worst, np.abs(b - base) / ref)
    with np.errstate(divide="ignore"):
        digits = -np.log10(worst) - 0.5
    digits = np.clip(np.where(np.isfinite(digits), digits, 15.9), 0.0, 15.9)
    if intercept and 0 not in keep:
        digits = digits[1:]
    return digits
