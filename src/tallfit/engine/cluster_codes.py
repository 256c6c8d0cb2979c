"""Dense codes for cluster keys, assigned in order of appearance, and their merge across parts.

Codes of a later part are appended to an earlier part's in that part's order of appearance, so
merging the parts in data order numbers the clusters exactly as one pass over all the data would.

A cluster key is numbered by the same discovering :class:`LevelCoder` (its numba hash table of
labels) that numbers the levels of categorical and absorbed columns; :class:`PairCoder` numbers
the pairs of two keys with the numba :class:`IntTable`. No Python loop runs per key or per row.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from tallfit.design.categorical import IntTable, LevelCoder
from tallfit.errors import DesignError


def _text(values: pa.Array) -> pa.Array:
    """The distinct values of a key column as strings (nulls, and NaN, as nulls).

    Strings are kept and binary values are read as their bytes; integers and booleans are written
    in decimal (``true``/``false``), so one key read as int32 in one file and int64 in another
    keeps its clusters. Floats: whole values as integers (5.0 and 5 are one cluster), others in
    their shortest round-trip form, NaN as missing. Any other type (dates, times, decimals) by
    Arrow's cast to string, which is one-to-one within a type."""
    t = values.type
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        return values
    if pa.types.is_fixed_size_binary(t):
        values, t = values.cast(pa.binary()), pa.binary()
    if pa.types.is_binary(t):
        return values.view(pa.string())
    if pa.types.is_large_binary(t):
        return values.view(pa.large_string())
    if pa.types.is_floating(t):
        f = values.cast(pa.float64())
        whole = pc.fill_null(pc.and_(pc.equal(pc.floor(f), f), pc.less(pc.abs(f), 2.0 ** 63)), False)
        ints = pc.cast(pc.cast(pc.if_else(whole, f, 0.0), pa.int64()), pa.string())
        text = pc.if_else(whole, ints, pc.cast(f, pa.string()))
        return pc.if_else(pc.is_nan(f), pa.scalar(None, pa.string()), text)
    try:
        return pc.cast(values, pa.string())
    except (pa.ArrowNotImplementedError, pa.ArrowInvalid) as exc:
        raise DesignError(f"a column of type {t} cannot be a cluster key (use labels, integers or dates)") from exc


def key_labels(arr) -> pa.Array:
    """A key column as a string column, or a string dictionary column holding only the entries
    its rows use, in order of their first row (the order in which a stream discovers them)."""
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    t = arr.type
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        return arr
    if pa.types.is_dictionary(t):  # a file's dictionary may hold values no used row has
        used = pc.dictionary_encode(arr.indices)
        return pa.DictionaryArray.from_arrays(used.indices, _text(arr.dictionary.take(used.dictionary)))
    try:
        enc = pc.dictionary_encode(arr)
    except pa.ArrowNotImplementedError as exc:
        raise DesignError(f"a column of type {t} cannot be a cluster key (use labels, integers or dates)") from exc
    return pa.DictionaryArray.from_arrays(enc.indices, _text(enc.dictionary))


class KeyCoder:
    """Maps the values of one key column to dense codes 0, 1, 2, … in order of first appearance.

    A thin layer over a discovering :class:`LevelCoder`: values are first written as strings
    (:func:`key_labels`), so every key type shares the label hash table; a missing value (null,
    or NaN in a float key) is an error naming where it was read."""

    def __init__(self, name: str) -> None:
        self.name = name
        self.levels = LevelCoder(name)

    def encode(self, arr, where: str) -> np.ndarray:
        codes = self.levels.codes(key_labels(arr), where)
        if codes.size and codes.min() < 0:  # LevelCoder codes a missing value -2
            raise DesignError(
                f"cluster column {self.name!r} has {int(np.count_nonzero(codes < 0))} missing value(s) in {where}: "
                "every used row needs a cluster; fill them or drop those rows before fitting"
            )
        return codes

    def absorb(self, other: "KeyCoder") -> np.ndarray:
        """Take in the keys of the part that follows; returns this coder's code for each of its
        codes (keys new here appended in its order)."""
        return self.levels.adopt(other.levels)

    @property
    def groups(self) -> int:
        """Distinct keys so far."""
        return self.levels.n_columns


class PairCoder:
    """Dense codes for pairs of two codes (the intersection clusters of two-way clustering), in
    order of first appearance; a pair is the key (a << 32) | b of a hash table of int64 keys."""

    def __init__(self, name: str) -> None:
        self.name = name
        self.table = IntTable()

    def encode(self, a: np.ndarray, b: np.ndarray) -> np.ndarray:
        return self.table.ids((a.astype(np.int64) << 32) | b.astype(np.int64))

    def absorb(self, other: "PairCoder", lut_a: np.ndarray, lut_b: np.ndarray) -> np.ndarray:
        """Take in another part's pairs, whose key codes map to ours by lut_a and lut_b."""
        keys = other.table.keys[: other.table.n]
        return self.table.ids((lut_a[keys >> 32] << 32) | lut_b[keys & 0xFFFFFFFF])

    @property
    def groups(self) -> int:
        return self.table.n
