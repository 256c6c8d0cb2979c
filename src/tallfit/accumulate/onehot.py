"""Categorical columns without dense indicator columns: per-cell statistics and a within factor.

A cell is one combination of the categorical columns' levels. With C the n × G cell indicator
matrix and Z = [X | y] the numeric columns, the exact factor of [C | Z] is

    [[diag(√n_c), diag(√n_c)·Z̄],
     [0,          W           ]]

(n_c the rows of cell c, Z̄ the cell means, W the factor of the rows centred on their cell
means), because [C Z]'[C Z] = [[diag n, N Z̄], [Z̄'N, Z'Z]] and Z'Z = Σ n_c z̄_c z̄_cᵀ + W'W. The
intercept and every level's indicator are sums of cell columns, so the factor of the usual
design [1 | X | D | y] is triu(qr(M)) of that matrix with its cell columns mapped to them
(:meth:`CellAccumulator.to_factor`) — equal to folding the dense indicator rows, to rounding,
while the pass folds only the k numeric columns. W is accumulated as in accumulate/absorb.py
(one Chan–Golub–LeVeque row per row, kernels/groups.py). Memory: cells × k.
"""

from __future__ import annotations

import numpy as np

from tallfit.accumulate.factor import FactorAccumulator, _add_counts
from tallfit.design.categorical import IntTable
from tallfit.design.spec import INTERCEPT, indicator_name
from tallfit.kernels.groups import within_rows
from tallfit.kernels.tsqr import fold_rows

#: Bits of one column's level code in a cell key (so up to 3 columns of < 2^21 levels each).
LEVEL_BITS = 21
MAX_COLUMNS = 3
#: Beyond this many cells the final QR (cells × levels) outweighs the saving; callers fall back.
MAX_CELLS = 200_000


def cell_keys(codes: list[np.ndarray]) -> np.ndarray:
    """One int64 key per row from the level codes (≥ 0) of up to three categorical columns."""
    key = codes[0].astype(np.int64)
    for c in codes[1:]:
        key = (key << LEVEL_BITS) | c
    return key


def _ensure_rows(a: np.ndarray, n: int) -> np.ndarray:
    if a.shape[0] >= n:
        return a
    grown = np.zeros((max(n, 2 * a.shape[0], 16),) + a.shape[1:], dtype=a.dtype)
    grown[: a.shape[0]] = a
    return grown


def count_block(acc: FactorAccumulator, block) -> None:
    """Everything of a block but its rows: counts, drops, ranges, weight sums, level counts."""
    m = block.A.shape[0]
    acc.n_used += m
    acc.n_read += block.n_read
    _add_counts(acc.dropped_by_column, block.dropped_by_column)
    if m:
        lo = block.col_min if block.col_min is not None else block.A.min(axis=0)
        hi = block.col_max if block.col_max is not None else block.A.max(axis=0)
        np.minimum(acc.col_min, lo, out=acc.col_min)
        np.maximum(acc.col_max, hi, out=acc.col_max)
    if getattr(block, "weight_sum", None) is not None:
        acc.weight_sum = (acc.weight_sum or 0.0) + block.weight_sum
        acc.weight_log_sum = (acc.weight_log_sum or 0.0) + block.weight_log_sum
    for col, counts in (getattr(block, "level_counts", None) or {}).items():
        _add_counts(acc.level_counts.setdefault(col, {}), counts)
    _add_counts(acc.filled, getattr(block, "filled", None) or {})


def grow_rows(a: np.ndarray, n: int) -> np.ndarray:
    """`a` with at least n rows (zeros appended, capacity doubled), same column layout."""
    return _ensure_rows(a, n)


class CellAccumulator:
    """Per-cell weight sums and means of Z = [X | y], and the within-cell factor of Z."""

    def __init__(self, spec, coders, z_names: list[str]) -> None:
        self.spec = spec
        self.coders = coders  # the Design's LevelCoders (levels discovered while streaming)
        self.z_names = list(z_names)
        k = len(z_names)
        self.W = FactorAccumulator.create(z_names)  # within-cell factor, counts, ranges, weights
        self.cells = IntTable()
        self.counts = np.zeros(0)
        self.means = np.zeros((0, k))
        self._out = np.zeros((0, k), order="F")

    @property
    def n_cells(self) -> int:
        return self.cells.n

    def update_block(self, block) -> None:
        A = block.A
        m = A.shape[0]
        if m:
            ids = self.cells.ids(cell_keys(block.codes))
            self.counts = _ensure_rows(self.counts, self.cells.n)
            self.means = _ensure_rows(self.means, self.cells.n)
            if self._out.shape[0] < m:
                self._out = np.zeros((m, A.shape[1]), order="F")
            w = getattr(block, "row_weights", None)
            r = within_rows(A, ids, np.zeros(0) if w is None else w, self.counts, self.means, self._out)
            if r:
                self.W.R = fold_rows(self.W.R, self._out[:r])
        count_block(self.W, block)

    def merge(self, other: "CellAccumulator") -> "CellAccumulator":
        """Take in the accumulator of another part of the data (changed in place; returned).

        Levels are matched by label (``LevelCoder.adopt``), so parts merged in order number
        levels and cells as one stream would. A cell in both gets the pairwise (Chan–Golub–
        LeVeque) row √(n_a n_b/(n_a + n_b))·(z̄_b − z̄_a) in the within factor, whose merge with
        the other's within factor is then exact."""
        maps = [mine.adopt(theirs) for mine, theirs in zip(self.coders, other.coders)]
        G_b = other.n_cells
        if G_b:
            lv = other.cell_levels()
            before = self.cells.n
            ids = self.cells.ids(cell_keys([mp[lv[:, c]] for c, mp in enumerate(maps)]))
            self.counts = _ensure_rows(self.counts, self.cells.n)
            self.means = _ensure_rows(self.means, self.cells.n)
            n_a, n_b = self.counts[ids], other.counts[:G_b]
            m_a, m_b = self.means[ids], other.means[:G_b]
            seen = ids < before
            n = n_a + n_b
            rows = np.sqrt(n_a[seen] * n_b[seen] / n[seen])[:, None] * (m_b[seen] - m_a[seen])
            self.means[ids] = np.where(seen[:, None], m_a + (m_b - m_a) * (n_b / n)[:, None], m_b)
            self.counts[ids] = n
        else:
            rows = np.zeros((0, len(self.z_names)))
        self.W = self.W.merge(other.W)
        if rows.shape[0]:
            self.W.R = fold_rows(self.W.R, np.asfortranarray(rows))
        return self

    def cell_levels(self) -> np.ndarray:
        """cells × columns: the level code of each categorical column in each cell."""
        keys = self.cells.keys[: self.cells.n]
        C = len(self.coders)
        out = np.empty((keys.size, C), dtype=np.int64)
        mask = (1 << LEVEL_BITS) - 1
        for c in range(C):
            out[:, C - 1 - c] = (keys >> (LEVEL_BITS * c)) & mask
        return out

    def raw_names(self) -> list[str]:
        """The design columns of the dense-indicator path: terms, one indicator per level, target."""
        # list(dict) copies at once: the reader thread may be adding levels meanwhile
        cat = [indicator_name(coder.column, lvl) for coder in self.coders for lvl in list(coder.index)]
        return self.spec.term_names + cat + [self.spec.target]

    def to_factor_bookkeeping(self, dense: FactorAccumulator) -> FactorAccumulator:
        """A dense factor (after a fallback) with this accumulator's counts and ranges."""
        dense.expand(self.raw_names())
        return self.to_factor(R=dense.R)

    def to_factor(self, R: np.ndarray | None = None) -> FactorAccumulator:
        """The accumulator of the dense design [1 | X | D | y] (every level its own column);
        ``R``: use this factor instead (bookkeeping only)."""
        names = self.raw_names()
        k_total = len(names)
        pos = {n: i for i, n in enumerate(names)}
        G = self.cells.n
        n = self.counts[:G]
        sq = np.sqrt(n)
        z_cols = [pos[z] for z in self.z_names]
        M = np.zeros((G + len(self.z_names), k_total), order="F")
        if INTERCEPT in pos:
            M[:G, pos[INTERCEPT]] = sq
        M[:G, z_cols] = sq[:, None] * self.means[:G]
        levels = self.cell_levels()
        for c, coder in enumerate(self.coders):
            first = pos[indicator_name(coder.column, list(coder.index)[0])] if coder.index else 0
            M[np.arange(G), first + levels[:, c]] = sq
        M[G:, z_cols] = self.W.R
        if R is None:
            R = fold_rows(np.zeros((k_total, k_total)), M)
        acc = self.W
        lo = np.zeros(k_total)
        hi = np.ones(k_total)
        lo[z_cols], hi[z_cols] = acc.col_min, acc.col_max
        if INTERCEPT in pos:
            lo[pos[INTERCEPT]] = 1.0
        return FactorAccumulator(
            names=names, R=R, n_read=acc.n_read, n_used=acc.n_used,
            dropped_by_column=dict(acc.dropped_by_column), col_min=lo, col_max=hi,
            weight_sum=acc.weight_sum, weight_log_sum=acc.weight_log_sum,
            level_counts={c: dict(v) for c, v in acc.level_counts.items()}, filled=dict(acc.filled),
        )
