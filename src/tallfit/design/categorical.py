"""Categorical columns as indicator (0/1) columns, with levels discovered while streaming.

While fitting, every level gets its own indicator column the first time it is seen (appended
to the design; for earlier rows it was zero, so the factor stays exact). The reference level,
rare-level merging and level order are decided after the pass by recoding the factor
(``design/coding.py``). For prediction and later passes a coder is *fixed*: levels map to the
final columns, the reference to none, and unseen levels follow a policy.
"""

from __future__ import annotations

import contextlib
import threading

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


#: Inside :func:`shared_labels` (a pass over parts), a fresh table's first labels, when there are
#: at least this many, are looked up in (and kept as) the shared seed below: the parts of a data
#: set read apart often start from the same dictionary (a Parquet file's row groups written from
#: one), hashed once instead of per part.
SEED_LABELS = 4096
SEED_MAX_LABELS = 1 << 20  # beyond this the copy kept (≈ 70 bytes per label) is not worth it
_seed_lock = threading.Lock()
_seed: tuple | None = None  # (labels, ids, n, used, key_off, key_data, table) of one fresh table
_seed_users = 0


@contextlib.contextmanager
def shared_labels():
    """Let fresh label tables share the hashing of a common first dictionary while this lasts;
    the seed is dropped when the last user leaves (nothing stays behind in the process)."""
    global _seed, _seed_users
    with _seed_lock:
        _seed_users += 1
    try:
        yield
    finally:
        with _seed_lock:
            _seed_users -= 1
            if _seed_users == 0:
                _seed = None


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
        if self.n == 0 and _seed_users and SEED_LABELS <= len(strings) <= SEED_MAX_LABELS:
            return self._seeded(strings)
        return self._hashed(strings)

    def _seeded(self, strings: pa.Array) -> np.ndarray:
        """``ids`` on a fresh table: from the shared seed when it holds the same labels (the
        table's state is then the very one hashing them gives), else hashed and kept as the seed."""
        global _seed
        with _seed_lock:
            seed = _seed
        if seed is not None and seed[0].equals(strings):
            _, ids, self.n, self.used, off, data, table = seed
            self.key_off, self.key_data, self.table = off.copy(), data.copy(), table.copy()
            return ids.copy()
        ids = self._hashed(strings)
        kept = (strings, ids.copy(), self.n, self.used, self.key_off.copy(), self.key_data.copy(), self.table.copy())
        with _seed_lock:
            if _seed_users:
                _seed = kept
        return ids

    def adopt(self, other: "StringTable") -> np.ndarray:
        """Ids here of the other table's labels, in its id order (new ones appended). When the
        labels of one table begin with all of the other's, in the same order (parts whose
        dictionaries are the same), that run is matched by comparing buffers, not by hashing."""
        n = min(self.n, other.n)
        if n and np.array_equal(self.key_off[: n + 1], other.key_off[: n + 1]) and np.array_equal(
                self.key_data[: self.key_off[n]], other.key_data[: other.key_off[n]]):
            if other.n == n:
                return np.arange(n, dtype=np.int64)
            # self's labels are all of the first n: the other's later ones are new here
            return np.concatenate([np.arange(n, dtype=np.int64), self._hashed(other.labels(n))])
        return self.ids(other.labels())

    def _hashed(self, strings: pa.Array) -> np.ndarray:
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

    def labels(self, start: int = 0) -> pa.Array:
        """The known strings in id order (from id ``start`` on), as an Arrow array over copies of
        this table's buffers."""
        off = self.key_off[start: self.n + 1] - self.key_off[start]  # a new array already
        data = np.ascontiguousarray(self.key_data[self.key_off[start]: self.used])
        return pa.LargeStringArray.from_buffers(self.n - start, pa.py_buffer(off), pa.py_buffer(data.copy()))


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
        self._index: dict[str, int] = {} if fixed is None else dict(fixed)  # level -> column (-1 reference)
        self.n_columns = n_columns
        self.other = other
        self.unseen = unseen
        self.unseen_rows = 0
        self.unseen_levels: dict[str, int] = {}
        self._value_set: pa.Array | None = None
        self._value_cols: np.ndarray | None = None
        self._table: StringTable | None = None
        self._ints: IntTable | None = None  # discovery of an integer column's levels
        self._last: tuple[pa.Array, np.ndarray] | None = None  # a batch dictionary and its columns
        self._last_fixed: tuple[pa.Array, np.ndarray] | None = None  # the same for a fixed coder

    @property
    def index(self) -> dict[str, int]:
        """Level → column. Levels found through the hash table are added here only when asked
        for (a key of 10^5 levels read in many parts would otherwise build this dict per part)."""
        table = self._table
        if table is not None and len(self._index) < table.n:
            for level in table.labels(len(self._index)).to_pylist():
                self._index[level] = len(self._index)
        ints = self._ints
        if ints is not None and len(self._index) < ints.n:
            for key in ints.keys[len(self._index): ints.n].tolist():
                self._index[str(key)] = len(self._index)  # as Arrow casts an integer to a string
        return self._index

    @property
    def names(self) -> list[str]:
        """Indicator column names in discovery mode (one per level, in order of first appearance)."""
        return [indicator_name(self.column, level) for level in self.index]

    def codes(self, arr: pa.Array, label: str) -> np.ndarray:
        """Column index per row; -1 for the reference level (all zeros), -2 for a null."""
        if isinstance(arr, pa.ChunkedArray):
            arr = arr.combine_chunks()
        if self.discover:
            fast = self._discovered_codes(arr)
            if fast is None:
                fast = self._discovered_int_codes(arr)
            if fast is not None:
                return fast
        if pa.types.is_dictionary(arr.type):
            codes = self._dictionary_entry_codes(arr, label)
        else:  # the distinct values first, then only those as strings (10^7 casts cost seconds)
            enc = pc.dictionary_encode(arr)
            if isinstance(enc, pa.ChunkedArray):
                enc = enc.combine_chunks()
            local = np.append(self._known_columns(level_strings(enc.dictionary), label), -2)  # nulls: the last slot
            idx = enc.indices.to_numpy(zero_copy_only=False)
            idx = np.where(enc.indices.is_null().to_numpy(zero_copy_only=False), len(enc.dictionary), idx)
            codes = local[idx.astype(np.int64)]
        if (codes == -3).any():
            bad = codes == -3
            self.unseen_rows += int(bad.sum())
            codes = np.where(bad, self.other if (self.unseen == "other" and self.other is not None) else -1, codes)
        return codes

    def _dictionary_entry_codes(self, arr: pa.DictionaryArray, label: str) -> np.ndarray:
        """Rows of a dictionary column take the column of their dictionary entry; entries are
        looked up once per dictionary (kept while batches share it, as a Parquet row group's do),
        and only when a row uses them: an unused entry of a level the model never saw is no
        unseen row."""
        dictionary = arr.dictionary
        d = len(dictionary)
        if self._last_fixed is None or not self._last_fixed[0].equals(dictionary):
            local = np.full(d + 1, -4, dtype=np.int64)  # -4: not looked up yet
            local[d] = -2  # null rows index the last slot
            self._last_fixed = (dictionary, local)
        local = self._last_fixed[1]
        indices = arr.indices.fill_null(d) if arr.null_count else arr.indices
        idx = indices.to_numpy(zero_copy_only=False).astype(np.int64, copy=False)
        todo = np.flatnonzero(local[:d] == -4)
        if todo.size:
            used = np.bincount(idx, minlength=d + 1)[:d] > 0
            todo = todo[used[todo]]
        if todo.size:
            levels = level_strings(dictionary.take(pa.array(todo)))
            valid = levels.is_valid().to_numpy(zero_copy_only=False)
            local[todo[~valid]] = -2  # a null inside the dictionary codes as a null row
            if valid.any():
                local[todo[valid]] = self._known_columns(levels.filter(pa.array(valid)), label)
        return local[idx]

    def _discovered_codes(self, arr) -> np.ndarray | None:
        """Discovery mode for labels: the batch's dictionary (from Parquet, or encoded here) is
        mapped once to columns through a hash table, and rows take their column by index; a batch
        with the same dictionary as the one before reuses its map. None for other column types."""
        parts = _dictionary_parts(arr)
        if parts is None:
            return None
        dictionary, indices = parts
        if self._table is None:
            if self._index:  # levels found by the general path first: keep their columns
                return None
            self._table = StringTable()
        if self._last is not None and self._last[0].equals(dictionary):
            cols = self._last[1]
        else:
            if dictionary.null_count:  # a null inside the dictionary codes as a null row
                valid = dictionary.is_valid().to_numpy(zero_copy_only=False)
                ids = np.full(len(dictionary), -2, dtype=np.int64)
                ids[valid] = self._table.ids(dictionary.filter(pa.array(valid)))
            else:
                ids = self._table.ids(dictionary)
            self.n_columns = self._table.n
            cols = np.append(ids, -2)  # nulls index the last slot
            self._last = (dictionary, cols)
        if indices.null_count:
            indices = indices.fill_null(len(dictionary))
        return cols[indices.to_numpy(zero_copy_only=False)]

    def _discovered_int_codes(self, arr) -> np.ndarray | None:
        """Discovery mode for an integer column: levels numbered in order of first appearance by
        a numba hash table of the values (no string per row); the level names are the values as
        strings, as on the general path. None for other column types."""
        if not pa.types.is_integer(arr.type) or pa.types.is_uint64(arr.type):
            return None  # uint64 beyond 2^63 would not fit the table's int64 keys
        if self._ints is None:
            if self._index or self._table is not None:  # levels found another way first
                return None
            self._ints = IntTable()
        values = arr.fill_null(0) if arr.null_count else arr
        values = values.to_numpy(zero_copy_only=False).astype(np.int64, copy=False)
        if arr.null_count:
            valid = arr.is_valid().to_numpy(zero_copy_only=False)
            codes = np.full(len(arr), -2, dtype=np.int64)
            codes[valid] = self._ints.ids(values[valid])
        else:
            codes = self._ints.ids(values)
        self.n_columns = self._ints.n
        return codes

    def adopt(self, other: "LevelCoder") -> np.ndarray:
        """Take in the levels of another discovering coder of the same column (a part of the data
        read apart): returns the code here of each of its codes, levels new here appended in its
        order, so merging parts in order numbers levels as one stream would."""
        n = other.n_columns
        if n == 0:
            return np.zeros(0, dtype=np.int64)
        fresh = self._table is None and self._ints is None and not self._index
        if other._ints is not None and (self._ints is not None or fresh):
            if self._ints is None:
                self._ints = IntTable()
            ids = self._ints.ids(other._ints.keys[: other._ints.n])
            self.n_columns = self._ints.n
            return ids
        if fresh:
            self._table = StringTable()
        if self._table is not None and other._table is not None:
            ids = self._table.adopt(other._table)
        else:
            labels = other._table.labels() if other._table is not None else \
                pa.array(sorted(other.index, key=other.index.__getitem__), type=pa.string())
            if self._table is None:  # levels found by the general path, or integers: one by one
                return np.array([self._column_of(level, "") for level in labels.to_pylist()], dtype=np.int64)
            ids = self._table.ids(labels)
        self.n_columns = self._table.n
        return ids

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
            if self._ints is not None:  # one numbering: the integer table's
                col = int(self._ints.ids(np.array([int(level)], dtype=np.int64))[0])
                self.n_columns = self._ints.n
                return col
            if self._table is not None:  # one numbering: the hash table's, as on the fast path
                col = int(self._table.ids(pa.array([level], type=pa.string()))[0])
                self.n_columns = self._table.n
                return col
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


def level_seed(levels: list[str], key_type: pa.DataType) -> pa.Array | None:
    """The labels of a model's levels as an array to seed a discovering coder for a key column of
    ``key_type`` (integers for an integer key; None when such a key can hold none of them)."""
    if pa.types.is_integer(key_type) and not pa.types.is_uint64(key_type):
        try:
            return pa.array([int(v) for v in levels], type=pa.int64())
        except (ValueError, OverflowError):
            return None  # labels that are not integers: every row of this key is a new level
    return pa.array(levels, type=pa.string())


def seeded_coder(column: str, seed: pa.Array | None) -> LevelCoder:
    """A discovering coder whose first ids are the seed's levels in order: a row's id below their
    count is a known level, any other a level first seen here. Rows find their level through the
    coder's hash tables (per distinct label, not per row)."""
    coder = LevelCoder(column)
    if seed is not None and len(seed):
        ids = coder.codes(seed, "")
        if not np.array_equal(ids, np.arange(len(seed))):  # pragma: no cover - a model file edited by hand
            raise DesignError(f"the model's levels of {column!r} are not distinct")
    return coder
