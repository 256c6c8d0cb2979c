"""The Gram path's accumulator: shifted co-moments plus the same counts and ranges as the factor's.

It has the four phases of every accumulator (create, update_block, merge, and reading the state)
and ends as an ordinary :class:`FactorAccumulator` (``to_factor``), so the solvers, inference,
model files and summaries are shared with the stable path. See ``kernels/gram.py`` for the
accuracy trade-off and ``digits`` for the estimate that says when the choice is unsafe.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from tallfit.accumulate.factor import FactorAccumulator
from tallfit.kernels.gram import SAFE_DIGITS, SHIFT_ROWS, CoMoments, comoment_digits, factor_from_comoments


@dataclass
class GramAccumulator:
    names: list[str]  # design terms, then the target
    intercept: bool
    cm: CoMoments
    n_read: int = 0
    dropped_by_column: dict[str, int] = field(default_factory=dict)
    col_min: np.ndarray | None = None
    col_max: np.ndarray | None = None

    @classmethod
    def create(cls, names: list[str], intercept: bool) -> "GramAccumulator":
        k = len(names)
        q = k - (1 if intercept else 0)
        return cls(list(names), bool(intercept), CoMoments.create(q),
                   col_min=np.full(k, np.inf), col_max=np.full(k, -np.inf))

    @property
    def n_used(self) -> int:
        return self.cm.n

    def update_block(self, block) -> None:
        """Add a DesignBlock (its matrix is left unchanged)."""
        A = block.A
        if A.shape[1] != len(self.names):
            raise ValueError(f"block has {A.shape[1]} columns, accumulator has {len(self.names)}")
        if A.shape[0]:
            first = 1 if self.intercept else 0
            if self.cm.shift is None:
                self.cm.shift = A[: min(A.shape[0], SHIFT_ROWS), first:].mean(axis=0)
            lo, hi = getattr(block, "col_min", None), getattr(block, "col_max", None)
            if lo is None or hi is None:  # the design measures them; other blocks are measured here
                lo, hi = A.min(axis=0), A.max(axis=0)
            np.minimum(self.col_min, lo, out=self.col_min)
            np.maximum(self.col_max, hi, out=self.col_max)
            self.cm.add_rows(A, first)
        self.n_read += block.n_read
        for name, count in block.dropped_by_column.items():
            self.dropped_by_column[name] = self.dropped_by_column.get(name, 0) + count

    def merge(self, other: "GramAccumulator") -> "GramAccumulator":
        if other.names != self.names or other.intercept != self.intercept:
            raise ValueError("cannot merge accumulators of different designs")
        dropped = dict(self.dropped_by_column)
        for name, count in other.dropped_by_column.items():
            dropped[name] = dropped.get(name, 0) + count
        return GramAccumulator(list(self.names), self.intercept, self.cm.merge(other.cm),
                               self.n_read + other.n_read, dropped,
                               np.minimum(self.col_min, other.col_min), np.maximum(self.col_max, other.col_max))

    def to_factor(self) -> FactorAccumulator:
        """The equivalent factor accumulator (R from Cholesky of the centred co-moment and the means)."""
        R = factor_from_comoments(self.cm, self.intercept) if self.cm.n else np.zeros((len(self.names),) * 2)
        return FactorAccumulator(
            names=list(self.names), R=R, n_read=self.n_read, n_used=self.cm.n,
            dropped_by_column=dict(self.dropped_by_column),
            col_min=self.col_min.copy(), col_max=self.col_max.copy(),
        )

    def digits(self, keep: list[int]) -> np.ndarray:
        """Estimated significant digits of each kept coefficient when solved from these co-moments."""
        return comoment_digits(self.cm, keep, self.intercept)

    def is_safe(self, keep: list[int]) -> bool:
        d = self.digits(keep)
        return bool(d.size == 0 or d.min() >= SAFE_DIGITS)
