"""Categorical columns as indicator (0/1) columns, with levels discovered while streaming.

While fitting, every level gets its own indicator column the first time it is seen (appended
to the design; for earlier rows it was zero, so the factor stays exact). The reference level,
rare-level merging and level order are decided after the pass by recoding the factor
(``design/coding.py``). For prediction and later passes a coder is *fixed*: levels map to the
final columns, the reference to none, and unseen levels follow a policy.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from tallfit.design.spec import indicator_name
from tallfit.errors import DesignError

UNSEEN_POLICIES = ("error", "reference", "other")
MISSING_LEVEL = "(missing)"
WIDE_LEVELS = 300  # common practice: beyond a few hundred levels, dense indicators are wasteful


def level_strings(arr: pa.Array) -> pa.Array:
    """Values of any string, dictionary, boolean or integer column as strings (nulls kept)."""
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    t = arr.type
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        return arr
    if pa.types.is_integer(t) or pa.types.is_boolean(t):
        return pc.cast(arr, pa.string())
    if pa.types.is_floating(t):
        values = arr.to_numpy(zero_copy_only=False)
        finite = values[np.isfinite(values)]
        if finite.size and np.any(finite != np.round(finite)):
            raise DesignError(
                "a categorical column must hold labels or whole numbers; it has fractional values "
                "(treat it as a numeric feature instead)"
            )
        ints = pc.cast(pc.if_else(pc.is_finite(arr), arr, None), pa.int64())
        return pc.cast(ints, pa.string())
    raise DesignError(f"a column of type {t} cannot be categorical (use strings, integers or booleans)")


class LevelCoder:
    """Maps the levels of one column to indicator columns and counts the rows of each level."""

    def __init__(self, column: str, fixed: dict[str, int] | None = None, n_columns: int = 0,
                 other: int | None = None, unseen: str = "error") -> None:
        if unseen not in UNSEEN_POLICIES:
            raise DesignError(f"unseen-level policy must be one of {', '.join(UNSEEN_POLICIES)}, not {unseen!r}")
        self.column = column
        self.discover = fixed is None
        self.index: dict[str, int] = {} if fixed is None else dict(fixed)  # level -> column (-1 reference)
        self.n_columns = n_columns
        self.other = other
        self.unseen = unseen
        self.unseen_rows = 0
        self.unseen_levels: dict[str, int] = {}
        self._value_set: pa.Array | None = None
        self._value_cols: np.ndarray | None = None

    @property
    def names(self) -> list[str]:
        """Indicator column names in discovery mode (one per level, in order of first appearance)."""
        return [indicator_name(self.column, level) for level in self.index]

    def codes(self, arr: pa.Array, label: str) -> np.ndarray:
        """Column index per row; -1 for the reference level (all zeros), -2 for a null."""
        strings = level_strings(arr)
        enc = pc.dictionary_encode(strings)
        if isinstance(enc, pa.ChunkedArray):
            enc = enc.combine_chunks()
        local = np.append(self._known_columns(enc.dictionary, label), -2)  # nulls index the last slot
        idx = enc.indices.to_numpy(zero_copy_only=False)
        idx = np.where(enc.indices.is_null().to_numpy(zero_copy_only=False), len(enc.dictionary), idx)
        codes = local[idx.astype(np.int64)]
        if (codes == -3).any():
            bad = codes == -3
            self.unseen_rows += int(bad.sum())
            codes = np.where(bad, self.other if (self.unseen == "other" and self.other is not None) else -1, codes)
        return codes

    def _known_columns(self, dictionary: pa.Array, label: str) -> np.ndarray:
        """Column of each entry of a batch's level dictionary: known levels by one hash lookup in
        Arrow (no Python loop over a key of 10^5 levels), new ones one by one."""
        out = np.full(len(dictionary), -4, dtype=np.int64)
        if self.index and len(dictionary):
            if self._value_set is None or len(self._value_set) != len(self.index):
                self._value_set = pa.array(list(self.index), type=pa.string())
                self._value_cols = np.fromiter(self.index.values(), dtype=np.int64, count=len(self.index))
            pos = pc.index_in(dictionary, value_set=self._value_set)
            found = pos.is_valid().to_numpy(zero_copy_only=False)
            out[found] = self._value_cols[pos.drop_null().to_numpy().astype(np.int64)]
        missing = np.flatnonzero(out == -4)
        if missing.size:
            levels = dictionary.take(pa.array(missing)).to_pylist()
            for i, level in zip(missing, levels):
                out[i] = self._column_of(level, label)
        return out

    def _column_of(self, level: str, label: str) -> int:
        col = self.index.get(level)
        if col is not None:
            return col
        if self.discover:
            self.index[level] = col = self.n_columns
            self.n_columns += 1
            return col
        if self.unseen == "error":
            raise DesignError(
                f"column {self.column!r} has level {level!r} in {label}, which the model never saw; "
                "choose how to score such rows (unseen levels as the reference level, or as the "
                "merged 'other' level) or refit with these data"
            )
        self.unseen_levels[level] = self.unseen_levels.get(level, 0) + 1
        return -3  # resolved by the caller per policy

    def indicators(self, codes: np.ndarray) -> np.ndarray:
        """Dense 0/1 block (rows × n_columns) for the given codes (reference and nulls: zeros)."""
        M = np.zeros((codes.shape[0], self.n_columns), dtype=np.float64, order="F")
        rows = np.flatnonzero(codes >= 0)
        M[rows, codes[rows]] = 1.0
        return M


def recount_levels(A: np.ndarray, names: list[str], levels: dict[str, dict[str, int]]) -> dict[str, dict[str, int]]:
    """Rows per categorical level among the rows of A, recounted from its indicator columns (a
    row of level L is non-zero in column "col[L]", weighted or not); for parts of a block."""
    index = {n: i for i, n in enumerate(names)}
    out: dict[str, dict[str, int]] = {}
    for col, counts in levels.items():
        d = out[col] = {}
        for lvl in counts:
            j = index.get(indicator_name(col, lvl))
            if j is not None:
                c = int(np.count_nonzero(A[:, j]))
                if c:
                    d[lvl] = c
    return out
