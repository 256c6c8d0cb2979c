"""Arrow record batch → float64 design block [X | y], with unusable rows dropped and counted."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from tallfit.design.spec import ModelSpec
from tallfit.kernels.ranged_copy import copy_with_range


@dataclass
class DesignBlock:
    """One batch as a Fortran-order float64 matrix A = [X | y] of its usable rows."""

    A: np.ndarray  # (m_used, p + 1), Fortran order; last column is the target
    n_read: int
    dropped_by_column: dict[str, int] = field(default_factory=dict)
    keep: np.ndarray | None = None  # mask of used rows among the rows read, None when every row is used
    filtered_keep: np.ndarray | None = None  # the same over the rows a --where filter kept (the SQL step's)
    extra: dict[str, pa.Array] = field(default_factory=dict)  # extra columns, used rows only
    file_index: int = -1
    row_start: int = 0
    names: list[str] | None = None  # design column names (target last) when the design can grow
    col_min: np.ndarray | None = None  # per-column range of the used rows, before any weighting
    col_max: np.ndarray | None = None
    weight_sum: float | None = None  # Σw and Σ log w of the used rows, when weighted
    weight_log_sum: float | None = None
    level_counts: dict[str, dict[str, int]] | None = None  # rows per categorical level
    filled: dict[str, int] = field(default_factory=dict)  # values filled per column
    # structured designs (Design(structured=True)): A holds [features | y] unweighted, and these
    row_weights: np.ndarray | None = None  # each used row's weight (also set for weighted dense designs)
    codes: list[np.ndarray] | None = None  # per categorical column, each used row's level code
    level_sizes: list[int] | None = None  # per categorical column, levels known when the block was made

    @property
    def n_used(self) -> int:
        return self.A.shape[0]

    def subset(self, idx: np.ndarray) -> "DesignBlock":
        """A block of the used rows ``idx`` only (their matrix rows, extra columns, codes and
        weights; ranges and the row mask left for the caller), from the same batch."""
        take = pa.array(idx)
        A = np.empty((idx.size, self.A.shape[1]), order="F")
        for j in range(A.shape[1]):  # column by column into Fortran order: one copy (A[idx] is C order)
            np.take(self.A[:, j], idx, out=A[:, j])
        return DesignBlock(
            A=A, n_read=int(idx.size), extra={k: v.take(take) for k, v in self.extra.items()},
            file_index=self.file_index, row_start=self.row_start, names=self.names,
            row_weights=None if self.row_weights is None else self.row_weights[idx],
            codes=None if self.codes is None else [c[idx] for c in self.codes], level_sizes=self.level_sizes,
        )


def column_as_float(col: pa.Array | pa.ChunkedArray) -> np.ndarray:
    """A numeric or boolean Arrow column as float64 with NaN for nulls (a copy only when needed)."""
    if isinstance(col, pa.ChunkedArray):
        col = col.combine_chunks()
    if pa.types.is_dictionary(col.type):
        col = col.dictionary_decode()
    if not pa.types.is_float64(col.type):
        col = pc.cast(col, pa.float64(), safe=False)
    return col.to_numpy(zero_copy_only=False)


def _matrix_for(m: int, k: int, out: np.ndarray | None) -> np.ndarray:
    if out is not None and out.shape == (m, k) and out.strides[0] == 8 and out.dtype == np.float64:
        return out
    return np.empty((m, k), dtype=np.float64, order="F")


def fill_ranged(
    batch: pa.RecordBatch, columns: list[str], leading_ones: bool, out: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray, bool]:
    """Fortran-order float64 matrix of the named columns (a column of ones first if asked), each
    column's min and max measured while it is copied (kernels.ranged_copy), and whether every
    value is finite; the ranges hold only when it is.

    ``out`` (m × k, contiguous columns: Fortran order or a row slice of it) is filled instead of a
    new matrix: reusing buffers saves the page faults of a fresh allocation per batch (≈ 20 ns per
    row at k = 22, measured). Float64 columns without nulls are read straight from Arrow's
    buffer, so each value is copied once.
    """
    m, k = batch.num_rows, len(columns) + (1 if leading_ones else 0)
    if out is not None and out.shape == (m, k) and out.strides[0] == 8 and out.dtype == np.float64:
        M = out
    else:
        M = np.empty((m, k), dtype=np.float64, order="F")
    lo, hi = np.empty(k), np.empty(k)
    finite = True
    j = 0
    if leading_ones:
        M[:, 0] = 1.0
        lo[0] = hi[0] = 1.0
        j = 1
    for name in columns:
        v = column_as_float(batch.column(name))
        lo[j], hi[j], ok = copy_with_range(v, v.view(np.int64), M[:, j])
        finite = finite and ok
        j += 1
    return M, lo, hi, finite


def finite_rows(M: np.ndarray, names: list[str], first: int) -> tuple[np.ndarray | None, dict[str, int]]:
    """Mask of rows finite in every column from `first` on, and the per-column count of bad rows."""
    with np.errstate(all="ignore"):
        sums = M[:, first:].sum(axis=0)
    if np.all(np.isfinite(sums)):  # one cheap pass: a NaN or infinity anywhere makes its sum non-finite
        return None, {}
    bad_by_col: dict[str, int] = {}
    keep = None
    for j, name in enumerate(names, start=first):
        ok = np.isfinite(M[:, j])
        if not ok.all():
            bad_by_col[name] = int(M.shape[0] - np.count_nonzero(ok))
            keep = ok if keep is None else keep & ok
    return keep, bad_by_col


def design_block(batch: pa.RecordBatch, spec: ModelSpec, out: np.ndarray | None = None) -> DesignBlock:
    """Build [X | y] for one batch; rows with a missing or non-finite value are dropped and counted.

    ``out`` is an optional reusable buffer (see ``fill_ranged``); the block's matrix is then that
    buffer, unless rows were dropped (a compacted copy). The block carries each column's range,
    measured while the columns are copied, with whether any value is missing (NaN or infinite),
    so the finiteness check costs nothing extra.
    """
    cols = spec.numeric_columns  # a plain design: the features and the target (an absorbed key rides along)
    A, lo, hi, finite = fill_ranged(batch, cols, spec.has_intercept_column, out=out)
    first = 1 if spec.has_intercept_column else 0
    if A.shape[0] == 0:
        return DesignBlock(A=A, n_read=0)
    keep, dropped = None, {}
    if not finite:
        keep, dropped = finite_rows(A, cols, first)
        if keep is not None:
            A = np.asfortranarray(A[keep])
        lo, hi = (A.min(axis=0), A.max(axis=0)) if A.shape[0] else (None, None)  # the fast ranges need finite values
    block = DesignBlock(A=A, n_read=batch.num_rows, dropped_by_column=dropped, keep=keep)
    if A.shape[0]:
        block.col_min, block.col_max = lo, hi
    return block


def feature_block(batch: pa.RecordBatch, spec: ModelSpec) -> tuple[np.ndarray, np.ndarray]:
    """X for prediction (all rows kept) and a mask of rows whose features are all finite."""
    X, _, _, finite = fill_ranged(batch, list(spec.features), spec.has_intercept_column)
    keep = None if finite else finite_rows(X, list(spec.features), 1 if spec.has_intercept_column else 0)[0]
    ok = np.ones(X.shape[0], dtype=bool) if keep is None else keep
    return X, ok
