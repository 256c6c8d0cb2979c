"""Absorbing a high-cardinality key: the within (fixed-effects) estimator in one streamed pass.

Per level g of the key we keep the row count n_g and the mean vector m_g of [X | y]; the
pooled within-level co-moment is kept in the stable form, as the triangular factor of the
within-level centred rows. A batch is merged in with the pairwise formulas of Chan, Golub &
LeVeque (The American Statistician 37, 1983): its rows are centred on their batch-level means
and folded in, and for a level seen before one extra row √(n_a n_b / (n_a + n_b))·(m_b − m_a)
carries the shift of its mean, so the factor equals that of the rows centred on their final
level means, exactly. Memory is O(levels × columns). By Frisch–Waugh–Lovell the slopes from
this factor equal those of a fit with one indicator per level; residual degrees of freedom are
n − G − p.
"""

from __future__ import annotations

import numpy as np

from tallfit.accumulate.factor import FactorAccumulator
from tallfit.design.categorical import LevelCoder
from tallfit.kernels.groups import centre_rows, group_means, merge_means
from tallfit.kernels.tsqr import fold_rows


class AbsorbAccumulator:
    """Within-level factor (as a FactorAccumulator over [X | y], no intercept) plus level stats."""

    def __init__(self, column: str, names: list[str]) -> None:
        self.column = column
        self.inner = FactorAccumulator.create(names)
        self.coder = LevelCoder(column)
        self.counts = np.zeros(0)
        self.means = np.zeros((0, len(names)), order="F")  # levels × columns, column-major

    @property
    def n_levels(self) -> int:
        return int(np.count_nonzero(self.counts))

    def _grow(self, k: int) -> None:
        G = self.coder.n_columns
        if self.means.shape[1] < k:  # design columns added while streaming (zero so far)
            pad = np.zeros((self.means.shape[0], k - self.means.shape[1]))
            self.means = np.asfortranarray(np.hstack([self.means[:, :-1], pad, self.means[:, -1:]]))
        if G > self.counts.size:  # grow by half again at least, so copies stay amortised O(G)
            extra = max(G - self.counts.size, self.counts.size // 2)
            self.counts = np.concatenate([self.counts, np.zeros(extra)])
            self.means = np.asfortranarray(np.vstack([self.means, np.zeros((extra, self.means.shape[1]))]))

    def update_block(self, block, key_values, label: str) -> None:
        names = getattr(block, "names", None)
        if names is not None and names != self.inner.names:
            self.inner.expand(names)
        A = block.A
        k = A.shape[1]
        codes = self.coder.codes(key_values, label)
        self._grow(k)
        if A.shape[0]:
            present, inv = np.unique(codes, return_inverse=True)
            nb, mb = group_means(A, inv.astype(np.int64), present.size)
            R = fold_rows(self.inner.R, centre_rows(A, mb, inv))  # rows centred on their batch means
            na = self.counts[present].astype(np.float64)
            seen = na > 0
            if seen.any():  # the Chan–Golub–LeVeque correction row of each level seen before
                scale = np.sqrt(na[seen] * nb[seen] / (na[seen] + nb[seen]))
                shift = (mb[seen] - self.means[present[seen]]) * scale[:, None]
                R = fold_rows(R, np.asfortranarray(shift))
            self.inner.R = R
            merge_means(self.means, self.counts, present.astype(np.int64), mb, nb)
        # counts, ranges and drops as for any factor (the rows themselves were folded above)
        self.inner.update(np.zeros((0, k)), n_read=block.n_read, dropped=block.dropped_by_column)
        self.inner.n_used += A.shape[0]
        if A.shape[0]:
            np.minimum(self.inner.col_min, A.min(axis=0), out=self.inner.col_min)
            np.maximum(self.inner.col_max, A.max(axis=0), out=self.inner.col_max)
        for col, counts in (getattr(block, "level_counts", None) or {}).items():
            d = self.inner.level_counts.setdefault(col, {})
            for lvl, c in counts.items():
                d[lvl] = d.get(lvl, 0) + c

    def levels(self) -> list[str]:
        return list(self.coder.index)

    def total_ss(self) -> float:
        """Σ (y − ȳ)² over all used rows: within part (from the factor) plus between part."""
        R = self.inner.R
        within = float(np.sum(R[:, -1] ** 2))
        n = self.counts.astype(np.float64)
        ybar = float(np.sum(n * self.means[:, -1]) / n.sum())
        between = float(np.sum(n * (self.means[:, -1] - ybar) ** 2))
        return within + between

    def effects(self, beta: np.ndarray, keep: list[int]) -> dict[str, float]:
        """Level effects α_g = ȳ_g − x̄_gᵀβ (the absorbed coefficients)."""
        X = self.means[:, keep]
        alpha = self.means[:, -1] - X @ beta
        return {lvl: float(alpha[i]) for lvl, i in self.coder.index.items() if self.counts[i] > 0}
