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
from tallfit.kernels.groups import int_ids, rehash_ints, rehash_strings, string_ids

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


def _pow2(n: int) -> int:
    return 1 << max(4, int(n - 1).bit_length())


class StringTable:
    """Labels → dense ids in order of discovery (a numba hash table: no Python loop per label)."""

    def __init__(self) -> None:
        self.n = 0
        self.used = 0
        self.key_off = np.zeros(17, dtype=np.int64)
        self.key_data = np.zeros(64, dtype=np.uint8)
        self.table = np.full(32, -1, dtype=np.int64)

    def ids(self, strings: pa.Array) -> np.ndarray:
        """Id of every entry of a string array without nulls (new labels get the next ids)."""
        d = len(strings)
        bufs = strings.buffers()
        wide = pa.types.is_large_string(strings.type)
        off = np.frombuffer(bufs[1], dtype=np.int64 if wide else np.int32)[strings.offset: strings.offset + d + 1]
        data = np.frombuffer(bufs[2], dtype=np.uint8) if bufs[2] is not None else np.zeros(0, np.uint8)
        nbytes = int(off[-1] - off[0]) if d else 0
        if self.key_off.size < self.n + d + 1:
            self.key_off = np.concatenate([self.key_off, np.zeros(max(d + 1, self.key_off.size), np.int64)])
        if self.key_data.size < self.used + nbytes:
            self.key_data = np.concatenate([self.key_data, np.zeros(max(nbytes, self.key_data.size), np.uint8)])
        if self.table.size < 2 * (self.n + d):
            self.table = rehash_strings(self.key_off, self.key_data, self.n, _pow2(4 * (self.n + d)))
        ids, self.n, self.used = string_ids(off.astype(np.int64), data, self.key_off, self.key_data,
                                            self.table, self.n, self.used)
        return ids


class IntTable:
    """Non-negative int64 keys → dense ids in order of discovery (numba hash table)."""

    def __init__(self) -> None:
        self.n = 0
        self.keys = np.zeros(16, dtype=np.int64)
        self.table = np.full(32, -1, dtype=np.int64)

    def ids(self, values: np.ndarray) -> np.ndarray:
        m = values.shape[0]
        if self.keys.size < self.n + m:
            self.keys = np.concatenate([self.keys, np.zeros(max(m, self.keys.size), np.int64)])
        if self.table.size < 2 * (self.n + m):
            self.table = rehash_ints(self.keys, self.n, _pow2(4 * (self.n + m)))
        ids, self.n = int_ids(np.ascontiguousarray(values, dtype=np.int64), self.keys, self.table, self.n)
        return ids


def _dictionary_parts(arr) -> tuple[pa.Array, pa.Array] | None:
    """(dictionary, indices) of a string or string-dictionary column, or None for other types."""
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    t = arr.type
    if pa.types.is_dictionary(t):
        if not (pa.types.is_string(t.value_type) or pa.types.is_large_string(t.value_type)):
            return None
        return arr.dictionary, arr.indices
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        enc = pc.dictionary_encode(arr)
        return enc.dictionary, enc.indices
    return None


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
        self._table: StringTable | None = None
        self._last: tuple[pa.Array, np.ndarray] | None = None  # a batch dictionary and its columns

    @property
    def names(self) -> list[str]:
        """Indicator column names in discovery mode (one per level, in order of first appearance)."""
        return [indicator_name(self.column, level) for level in self.index]

    def codes(self, arr: pa.Array, label: str) -> np.ndarray:
        """Column index per row; -1 for the reference level (all zeros), -2 for a null."""
        if self.discover:
            fast = self._discovered_codes(arr)
            if fast is not None:
                return fast
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

    def _discovered_codes(self, arr) -> np.ndarray | None:
        """Discovery mode for labels: the batch's dictionary (from Parquet, or encoded here) is
        mapped once to columns through a hash table, and rows take their column by index; a batch
        with the same dictionary as the one before reuses its map. None for other column types."""
        parts = _dictionary_parts(arr)
        if parts is None:
            return None
        dictionary, indices = parts
        if dictionary.null_count:
            return None
        if self._table is None:
            if self.index:  # levels found by the general path first: keep their columns
                return None
            self._table = StringTable()
        if self._last is not None and self._last[0].equals(dictionary):
            cols = self._last[1]
        else:
            before = self._table.n
            ids = self._table.ids(dictionary)
            new = np.flatnonzero(ids >= before)
            if new.size:
                for i, level in zip(ids[new], dictionary.take(pa.array(new)).to_pylist()):
                    self.index[level] = int(i)
                self.n_columns = self._table.n
            cols = np.append(ids, -2)  # nulls index the last slot
            self._last = (dictionary, cols)
        if indices.null_count:
            indices = indices.fill_null(len(dictionary))
        return cols[indices.to_numpy(zero_copy_only=False)]

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
