"""Dense codes for cluster keys, assigned in order of appearance, and their merge across parts.

Codes of a later part are appended to an earlier part's in that part's order of appearance, so
merging the parts in data order numbers the clusters exactly as one pass over all the data would.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from tallfit.errors import DesignError


class KeyCoder:
    """Maps the values of one key column (any Arrow type) to dense codes 0, 1, 2, … as they appear."""

    def __init__(self, name: str) -> None:
        self.name = name
        self.codes: dict[Any, int] = {}

    def encode(self, arr: pa.Array, where: str) -> np.ndarray:
        if isinstance(arr, pa.ChunkedArray):
            arr = arr.combine_chunks()
        if arr.null_count:
            raise DesignError(
                f"cluster column {self.name!r} has {arr.null_count} missing value(s) in {where}: every "
                "used row needs a cluster; fill them or drop those rows before fitting"
            )
        if not pa.types.is_dictionary(arr.type):
            arr = pc.dictionary_encode(arr)
        values = arr.dictionary.to_pylist()
        lut = np.fromiter((self.codes.setdefault(v, len(self.codes)) for v in values), np.int64, len(values))
        return lut[arr.indices.to_numpy(zero_copy_only=False)] if len(values) else np.zeros(0, np.int64)

    def absorb(self, other: "KeyCoder") -> np.ndarray:
        """Take in another part's keys; returns this coder's code for each of its codes."""
        return np.fromiter((self.codes.setdefault(v, len(self.codes)) for v in other.codes),
                           np.int64, len(other.codes))

    @property
    def groups(self) -> int:
        return len(self.codes)


class PairCoder:
    """Dense codes for pairs of two codes (the intersection clusters of two-way clustering)."""

    def __init__(self, name: str) -> None:
        self.name = name
        self.codes: dict[int, int] = {}

    def encode(self, a: np.ndarray, b: np.ndarray) -> np.ndarray:
        key = (a.astype(np.int64) << 32) | b.astype(np.int64)
        uniq, first, inv = np.unique(key, return_index=True, return_inverse=True)
        order = np.argsort(first, kind="stable")  # new pairs get codes in order of appearance
        codes = np.empty(len(uniq), dtype=np.int64)
        codes[order] = np.fromiter((self.codes.setdefault(int(k), len(self.codes)) for k in uniq[order]),
                                   np.int64, len(uniq))
        return codes[inv.ravel()]

    def absorb(self, other: "PairCoder", lut_a: np.ndarray, lut_b: np.ndarray) -> np.ndarray:
        """Take in another part's pairs, whose key codes map to ours by lut_a and lut_b."""
        keys = np.fromiter(other.codes, np.int64, len(other.codes))
        mapped = (lut_a[keys >> 32] << 32) | lut_b[keys & 0xFFFFFFFF]
        return np.fromiter((self.codes.setdefault(int(k), len(self.codes)) for k in mapped),
                           np.int64, len(mapped))

    @property
    def groups(self) -> int:
        return len(self.codes)
