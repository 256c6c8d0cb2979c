"""The mergeable sufficient statistic of least squares: the triangular factor of [X | y].

Four phases, as for every accumulator here: ``create`` (empty), ``update`` (fold a block of
rows), ``merge`` (combine two accumulators over disjoint rows), and the state is read by the
solvers. Merging is associative and, up to rounding, commutative, so any grouping of batches,
files or workers gives the same factor.

Besides R the accumulator keeps what inference and later checks need and R cannot give: the
row counts (read, used, dropped per column) and each feature's observed range (to warn about
extrapolation at prediction time).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from tallfit.kernels.tsqr import fold_rows, merge_factors, normalize_signs


@dataclass
class FactorAccumulator:
    """R (k × k, R'R = A'A) for A = [X | y] over the rows seen, with counts and column ranges."""

    names: list[str]  # the k column names: design terms, then the target
    R: np.ndarray
    n_read: int = 0
    n_used: int = 0
    dropped_by_column: dict[str, int] = field(default_factory=dict)
    col_min: np.ndarray | None = None
    col_max: np.ndarray | None = None

    @classmethod
    def create(cls, names: list[str]) -> "FactorAccumulator":
        k = len(names)
        return cls(
            names=list(names),
            R=np.zeros((k, k)),
            col_min=np.full(k, np.inf),
            col_max=np.full(k, -np.inf),
        )

    @property
    def k(self) -> int:
        return len(self.names)

    def update(self, A: np.ndarray, n_read: int | None = None, dropped: dict[str, int] | None = None) -> None:
        """Fold the usable rows A (m × k) into the factor and the counts."""
        if A.shape[1] != self.k:
            raise ValueError(f"block has {A.shape[1]} columns, accumulator has {self.k}")
        if A.shape[0]:
            self.R = fold_rows(self.R, A)
            np.minimum(self.col_min, A.min(axis=0), out=self.col_min)
            np.maximum(self.col_max, A.max(axis=0), out=self.col_max)
        self.n_used += A.shape[0]
        self.n_read += A.shape[0] if n_read is None else n_read
        for name, count in (dropped or {}).items():
            self.dropped_by_column[name] = self.dropped_by_column.get(name, 0) + count

    def update_block(self, block) -> None:
        """Fold a DesignBlock (its used rows, read count and per-column drops).

        Prefer this to ``update``: it is where designs whose columns grow during the scan
        (categorical levels first seen late) are aligned with the factor.
        """
        self.update(block.A, n_read=block.n_read, dropped=block.dropped_by_column)

    def merge(self, other: "FactorAccumulator") -> "FactorAccumulator":
        """A new accumulator over the rows of both (neither input is changed)."""
        if other.names != self.names:
            raise ValueError("cannot merge accumulators of different designs")
        dropped = dict(self.dropped_by_column)
        for name, count in other.dropped_by_column.items():
            dropped[name] = dropped.get(name, 0) + count
        return FactorAccumulator(
            names=list(self.names),
            R=merge_factors(self.R, other.R),
            n_read=self.n_read + other.n_read,
            n_used=self.n_used + other.n_used,
            dropped_by_column=dropped,
            col_min=np.minimum(self.col_min, other.col_min),
            col_max=np.maximum(self.col_max, other.col_max),
        )

    @property
    def n_dropped(self) -> int:
        return self.n_read - self.n_used

    def canonical_R(self) -> np.ndarray:
        """R with a non-negative diagonal (the form stored in model files)."""
        return normalize_signs(self.R)

    def to_state(self) -> dict:
        """A JSON-ready dict of the whole state (floats as Python floats, so they round-trip)."""
        return {
            "names": list(self.names),
            "R": [[float(v) for v in row[i:]] for i, row in enumerate(self.canonical_R())],
            "n_read": int(self.n_read),
            "n_used": int(self.n_used),
            "dropped_by_column": {k: int(v) for k, v in self.dropped_by_column.items()},
            "col_min": [float(v) for v in self.col_min],
            "col_max": [float(v) for v in self.col_max],
        }

    @classmethod
    def from_state(cls, state: dict) -> "FactorAccumulator":
        names = list(state["names"])
        k = len(names)
        rows = state["R"]
        if len(rows) != k or any(len(r) != k - i for i, r in enumerate(rows)):
            raise ValueError(f"stored factor does not match its {k} column names")
        R = np.zeros((k, k))
        for i, row in enumerate(rows):
            R[i, i:] = np.asarray(row, dtype=np.float64)
        return cls(
            names=names,
            R=R,
            n_read=int(state["n_read"]),
            n_used=int(state["n_used"]),
            dropped_by_column={k_: int(v) for k_, v in state["dropped_by_column"].items()},
            col_min=np.asarray(state["col_min"], dtype=np.float64),
            col_max=np.asarray(state["col_max"], dtype=np.float64),
        )
