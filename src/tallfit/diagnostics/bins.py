"""Binned residual sums per feature (or per fitted value), streamed, then coarsened to bins.

During the pass every value falls in a cell of a fine uniform grid (``GRID_CELLS`` cells between
bounds taken from a sample of the first rows, plus one cell below and one above, so no row is
lost) and each cell keeps the count, Σx, Σe and Σe². Afterwards adjacent cells are joined into
about ``target`` bins of roughly equal counts (quantile bins, to the grid's resolution), and each
bin reports its residual mean and spread and its partial residual b·x̄ + ē. Sums of cells are
exact, so a bin's numbers equal a direct computation over the rows in it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tallfit.diagnostics.kernels import grid_bin_sums_rows, grid_bin_sums_weighted

GRID_CELLS = 1024
TAIL = 0.0005  # a sample of part of the data sets the grid between its 0.05 % and 99.95 % points


def tail_points(S: np.ndarray, q: float, overwrite: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """The q and 1 − q quantiles of each column of S (m × c), as ``np.quantile``'s default (linear)
    method gives them, from one-sided partitions of each column: np.quantile partitions a copy of
    all of S at four ranks at once, which measured about 6× slower on a 131,072-row sample. With
    ``overwrite`` the columns of S (Fortran order) are reordered in place instead of copied."""
    m = S.shape[0]
    lo, hi = np.empty(S.shape[1]), np.empty(S.shape[1])
    for j in range(S.shape[1]):
        x = S[:, j] if overwrite and S.flags.f_contiguous else S[:, j].copy()
        for out, pos in ((lo, q * (m - 1)), (hi, (1.0 - q) * (m - 1))):
            i = int(np.floor(pos))
            t = pos - i
            if i + 1 < m:  # order statistics i and i + 1: the smallest of the top m − i after one split
                x.partition(i)
                a = x[i]
                b = x[i + 1:].min()
            else:
                a = b = x.max()
            # numpy's lerp: a + (b − a)·t, from the upper end when t ≥ ½
            out[j] = b - (b - a) * (1.0 - t) if t >= 0.5 else a + (b - a) * t
    return lo, hi


@dataclass
class Grid:
    """Per column: the grid's low end, cells per unit of x, and the number of cells."""

    lo: np.ndarray
    scale: np.ndarray
    cells: int = GRID_CELLS

    @classmethod
    def from_sample(cls, S: np.ndarray, whole: bool, cells: int = GRID_CELLS, overwrite: bool = False) -> "Grid":
        """Bounds from the sample rows S (m × q): its range when it is all the data, else quantiles
        (``overwrite``: S's columns may be reordered in place, see tail_points)."""
        if S.shape[0] == 0:
            return cls(np.zeros(S.shape[1]), np.ones(S.shape[1]), cells)
        if whole:
            lo, hi = S.min(axis=0), S.max(axis=0)
        else:
            lo, hi = tail_points(S, TAIL, overwrite)
            pad = 0.05 * (hi - lo)
            lo, hi = lo - pad, hi + pad
        width = hi - lo
        # the top value of the range belongs in the last interior cell, not above it
        width = np.where(width > 0, width * (1.0 + 1e-12) + np.abs(hi) * 1e-15, 1.0)
        return cls(np.asarray(lo, dtype=float), cells / width, cells)

    def left_edges(self, j: int) -> np.ndarray:
        """x at the start of each interior cell 1..cells, and at the end of the last (cells + 1 values)."""
        return self.lo[j] + np.arange(self.cells + 1) / self.scale[j]


@dataclass
class BinnedSums:
    """Per column and grid cell: count, Σx, Σe, Σe² (create / update / merge)."""

    grid: Grid
    sums: np.ndarray  # (q, cells + 2, 4)
    lo_seen: np.ndarray
    hi_seen: np.ndarray

    @classmethod
    def create(cls, grid: Grid) -> "BinnedSums":
        q = len(grid.lo)
        return cls(grid, np.zeros((q, grid.cells + 2, 4)), np.full(q, np.inf), np.full(q, -np.inf))

    def update(self, A: np.ndarray, e: np.ndarray, cols: np.ndarray | None = None,
               kbuf: np.ndarray | None = None,
               ranges: tuple[np.ndarray, np.ndarray] | None = None, w: np.ndarray | None = None) -> None:
        """Fold the rows of A's columns ``cols`` (all by default) with their residuals e (indexed
        like A's rows). ``ranges``: the minimum and maximum of each of A's columns when the caller
        has them (a design block does), else numpy measures them. ``w``: frequency weights, each
        row counted wᵢ times (rows of weight 0 leave the ranges alone too)."""
        m = A.shape[0]
        if m == 0:
            return
        cols = np.arange(A.shape[1], dtype=np.int64) if cols is None else np.asarray(cols, dtype=np.int64)
        if w is not None:
            counted = A[np.ix_(w > 0, cols)]  # only the binned columns of the rows that count
            if counted.shape[0]:
                np.minimum(self.lo_seen, counted.min(axis=0), out=self.lo_seen)
                np.maximum(self.hi_seen, counted.max(axis=0), out=self.hi_seen)
            grid_bin_sums_weighted(A, cols, e, w, self.grid.lo, self.grid.scale, self.grid.cells, self.sums,
                                   np.empty(m, dtype=np.int32))
            return
        if ranges is None:
            ranges = (A.min(axis=0), A.max(axis=0))
        np.minimum(self.lo_seen, ranges[0][cols], out=self.lo_seen)
        np.maximum(self.hi_seen, ranges[1][cols], out=self.hi_seen)
        if kbuf is None or len(kbuf) < m:
            kbuf = np.empty(m, dtype=np.int32)
        grid_bin_sums_rows(A, 0, m, cols, e, self.grid.lo, self.grid.scale, self.grid.cells, self.sums, kbuf)

    def merge(self, other: "BinnedSums") -> "BinnedSums":
        return BinnedSums(self.grid, self.sums + other.sums, np.minimum(self.lo_seen, other.lo_seen),
                          np.maximum(self.hi_seen, other.hi_seen))

    def coarsen(self, j: int, target: int = 20) -> "BinnedSummary":
        """Join the cells of column j into about ``target`` bins of similar counts."""
        cells = self.sums[j]
        counts = cells[:, 0]
        n = counts.sum()
        cum = np.cumsum(counts)
        # a bin ends at the first cell where the running count passes the next multiple of n/target
        cuts = np.unique(np.searchsorted(cum, n * np.arange(1, target) / target, side="left"))
        bounds = np.concatenate([[0], cuts + 1, [len(counts)]])
        bounds = np.unique(np.clip(bounds, 0, len(counts)))
        edges = np.concatenate([[self.lo_seen[j]], self.grid.left_edges(j), [self.hi_seen[j]]])
        rows = []
        for a, b in zip(bounds[:-1], bounds[1:]):
            s = cells[a:b].sum(axis=0)
            if s[0] == 0:
                continue
            rows.append((s[0], s[1], s[2], s[3], max(edges[a], self.lo_seen[j]), min(edges[b], self.hi_seen[j])))
        arr = np.asarray(rows, dtype=float).reshape(-1, 6)
        count, sx, se, se2 = arr[:, 0], arr[:, 1], arr[:, 2], arr[:, 3]
        mean_e = se / count
        with np.errstate(invalid="ignore", divide="ignore"):
            var = np.where(count > 1, (se2 - count * mean_e**2) / (count - 1), np.nan)
        return BinnedSummary(
            count=np.rint(count).astype(np.int64),  # weight sums with frequency weights
            x_mean=sx / count,
            x_low=arr[:, 4],
            x_high=arr[:, 5],
            resid_mean=mean_e,
            resid_sd=np.sqrt(np.maximum(var, 0.0)),
        )


@dataclass
class BinnedSummary:
    """Bins of one column: rows, mean of x, its range, and the residuals' mean and spread."""

    count: np.ndarray
    x_mean: np.ndarray
    x_low: np.ndarray
    x_high: np.ndarray
    resid_mean: np.ndarray
    resid_sd: np.ndarray

    def partial_residual(self, coef: float) -> np.ndarray:
        """Component plus residual per bin: coef·x̄ + ē (Ezekiel 1924; Larsen & McCleary 1972)."""
        return coef * self.x_mean + self.resid_mean

    def to_dict(self) -> dict:
        return {k: getattr(self, k).tolist() for k in self.__dataclass_fields__}
