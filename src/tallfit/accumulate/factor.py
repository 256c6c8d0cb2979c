"""The mergeable sufficient statistic of least squares: the triangular factor of [X | y].

Four phases, as for every accumulator here: ``create`` (empty), ``update`` (fold a block of
rows), ``merge`` (combine two accumulators over disjoint rows), and the state is read by the
solvers. Merging is associative and, up to rounding, commutative, so any grouping of batches,
files or workers gives the same factor.

Besides R the accumulator keeps what inference and later checks need and R cannot give: the
row counts (read, used, dropped per column and reason), each column's observed range (to warn
about extrapolation), the weight sums of a weighted fit, and the rows per categorical level.

Columns can be added while streaming (a categorical level first seen late): a new column is a
zero column for every earlier row, so inserting a zero row and column into R keeps it exact
(../shared/NUMERICS.md). Any linear recoding of the columns (reference level, merged levels,
another column order) is applied to the factor as triu(qr(R·T)), since (RT)'(RT) = T'A'AT.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.linalg import qr

from tallfit.kernels.tsqr import fold_rows, merge_factors, normalize_signs


def _add_counts(into: dict, other: dict) -> dict:
    for name, count in other.items():
        into[name] = into.get(name, 0) + count
    return into


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
    weight_sum: float | None = None
    weight_log_sum: float | None = None
    level_counts: dict[str, dict[str, int]] = field(default_factory=dict)
    filled: dict[str, int] = field(default_factory=dict)
    # the factor the last fold made for this accumulator: while R is that array it may be folded
    # into in place (merges and recodings make new arrays, so they are never changed behind them)
    _folded: np.ndarray | None = field(default=None, repr=False, compare=False)

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

    # -- update ---------------------------------------------------------------------------------
    def update(self, A: np.ndarray, n_read: int | None = None, dropped: dict[str, int] | None = None,
               col_min: np.ndarray | None = None, col_max: np.ndarray | None = None, *,
               overwrite: bool = False) -> None:
        """Fold the usable rows A (m × k) into the factor and the counts (``overwrite``: A may be
        destroyed, which saves a copy)."""
        if A.shape[1] != self.k:
            raise ValueError(f"block has {A.shape[1]} columns, accumulator has {self.k}")
        if A.shape[0]:
            np.minimum(self.col_min, A.min(axis=0) if col_min is None else col_min, out=self.col_min)
            np.maximum(self.col_max, A.max(axis=0) if col_max is None else col_max, out=self.col_max)
            # after the ranges: it may destroy A
            self.R = self._folded = fold_rows(self.R, A, overwrite=overwrite, into=self.R is self._folded)
        self.n_used += A.shape[0]
        self.n_read += A.shape[0] if n_read is None else n_read
        _add_counts(self.dropped_by_column, dropped or {})

    def update_block(self, block, *, overwrite: bool = False) -> None:
        """Fold a DesignBlock: its used rows, counts, ranges, weights and level counts.

        Prefer this to ``update``: it is where designs whose columns grow during the scan
        (categorical levels first seen late) are aligned with the factor. ``overwrite``: the
        block's matrix is not needed afterwards and may be destroyed.
        """
        names = getattr(block, "names", None)
        if names is not None and names != self.names:
            self.expand(names)
        self.update(block.A, n_read=block.n_read, dropped=block.dropped_by_column,
                    col_min=getattr(block, "col_min", None), col_max=getattr(block, "col_max", None),
                    overwrite=overwrite)
        if getattr(block, "weight_sum", None) is not None:
            self.weight_sum = (self.weight_sum or 0.0) + block.weight_sum
            self.weight_log_sum = (self.weight_log_sum or 0.0) + block.weight_log_sum
        for col, counts in (getattr(block, "level_counts", None) or {}).items():
            _add_counts(self.level_counts.setdefault(col, {}), counts)
        _add_counts(self.filled, getattr(block, "filled", None) or {})

    # -- column growth and recoding ---------------------------------------------------------
    def expand(self, names: list[str]) -> None:
        """Insert the columns of `names` not yet present, as zero columns (exact: they were zero
        for every row so far). The old columns must keep their order, the target staying last;
        new ones may come anywhere before it (levels of an earlier categorical column found late)."""
        old = self.names
        if names == old:
            return
        index = {n: i for i, n in enumerate(names)}
        pos = [index.get(n, -1) for n in old]
        if names[-1] != old[-1] or -1 in pos or any(b <= a for a, b in zip(pos, pos[1:])):
            raise ValueError("expand needs the new names to keep the old ones in order, target last")
        k_new = len(names)
        R = np.zeros((k_new, k_new))
        R[np.ix_(pos, pos)] = self.R
        self.R = R
        lo, hi = np.full(k_new, np.inf), np.full(k_new, -np.inf)
        lo[pos], hi[pos] = self.col_min, self.col_max
        self.col_min, self.col_max = lo, hi
        self.names = list(names)

    def recoded(self, T: np.ndarray, names: list[str]) -> "FactorAccumulator":
        """The accumulator of A·T (T maps the k old columns to the new ones; target last, kept)."""
        if T.shape != (self.k, len(names)):
            raise ValueError(f"recoding matrix is {T.shape}, expected ({self.k}, {len(names)})")
        RT = self.R @ T
        k_new = len(names)
        if RT.shape[0] < k_new:
            RT = np.vstack([RT, np.zeros((k_new - RT.shape[0], k_new))])
        R = np.triu(qr(RT, mode="r")[0])[:k_new]
        lo = np.where(T > 0, self.col_min[:, None], np.inf).min(axis=0)
        hi = np.where(T > 0, self.col_max[:, None], -np.inf).max(axis=0)
        return FactorAccumulator(
            names=list(names), R=R, n_read=self.n_read, n_used=self.n_used,
            dropped_by_column=dict(self.dropped_by_column), col_min=lo, col_max=hi,
            weight_sum=self.weight_sum, weight_log_sum=self.weight_log_sum,
            level_counts={c: dict(v) for c, v in self.level_counts.items()}, filled=dict(self.filled),
        )

    def aligned(self, names: list[str]) -> "FactorAccumulator":
        """The same rows with columns `names` (a superset, any order; absent columns are zero)."""
        if names == self.names:
            return self
        index = {n: i for i, n in enumerate(names)}
        missing = [n for n in self.names if n not in index]
        if missing:
            raise ValueError(f"cannot align: columns {missing} are not in the target layout")
        T = np.zeros((self.k, len(names)))
        for i, n in enumerate(self.names):
            T[i, index[n]] = 1.0
        return self.recoded(T, names)

    # -- merge ------------------------------------------------------------------------------------
    def merge(self, other: "FactorAccumulator") -> "FactorAccumulator":
        """A new accumulator over the rows of both (neither input is changed)."""
        a, b = self, other
        if b.names != a.names:
            union = list(dict.fromkeys(a.names[:-1] + b.names[:-1])) + [a.names[-1]]
            if a.names[-1] != b.names[-1]:
                raise ValueError("cannot merge accumulators with different targets")
            a, b = a.aligned(union), b.aligned(union)
        levels = {c: dict(v) for c, v in a.level_counts.items()}
        for col, counts in b.level_counts.items():
            _add_counts(levels.setdefault(col, {}), counts)
        weighted = a.weight_sum is not None or b.weight_sum is not None
        return FactorAccumulator(
            names=list(a.names),
            R=merge_factors(a.R, b.R),
            n_read=a.n_read + b.n_read,
            n_used=a.n_used + b.n_used,
            dropped_by_column=_add_counts(dict(a.dropped_by_column), b.dropped_by_column),
            col_min=np.minimum(a.col_min, b.col_min),
            col_max=np.maximum(a.col_max, b.col_max),
            weight_sum=(a.weight_sum or 0.0) + (b.weight_sum or 0.0) if weighted else None,
            weight_log_sum=(a.weight_log_sum or 0.0) + (b.weight_log_sum or 0.0) if weighted else None,
            level_counts=levels,
            filled=_add_counts(dict(a.filled), b.filled),
        )

    @property
    def n_dropped(self) -> int:
        return self.n_read - self.n_used

    def canonical_R(self) -> np.ndarray:
        """R with a non-negative diagonal (the form stored in model files)."""
        return normalize_signs(self.R)

    # -- state ------------------------------------------------------------------------------------
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
            "weight_sum": self.weight_sum,
            "weight_log_sum": self.weight_log_sum,
            "level_counts": {c: dict(v) for c, v in self.level_counts.items()},
            "filled": dict(self.filled),
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
        ws = state.get("weight_sum")
        wl = state.get("weight_log_sum")
        return cls(
            names=names,
            R=R,
            n_read=int(state["n_read"]),
            n_used=int(state["n_used"]),
            dropped_by_column={k_: int(v) for k_, v in state["dropped_by_column"].items()},
            col_min=np.asarray(state["col_min"], dtype=np.float64),
            col_max=np.asarray(state["col_max"], dtype=np.float64),
            weight_sum=None if ws is None else float(ws),
            weight_log_sum=None if wl is None else float(wl),
            level_counts={c: {str(k_): int(v) for k_, v in d.items()} for c, d in state.get("level_counts", {}).items()},
            filled={k_: int(v) for k_, v in state.get("filled", {}).items()},
        )
