"""Per-fold factors for holdout and k-fold cross-validation, filled in the one fitting pass.

Rows are assigned by a deterministic rule: a 64-bit hash of a key column (so every row of one
host, or one day, lands in the same fold) or of the row's position in the scan, mixed with a
seed. The hash is SplitMix64's finaliser (Steele, Lea & Flood, "Fast splittable pseudorandom
number generators", OOPSLA 2014); strings are first reduced to a polynomial code of their UTF-8
bytes. The same data, key and seed always give the same split.

Each fold keeps its own :class:`FactorAccumulator`. Because the factor is a monoid, the training
factor of fold j is the merge of the other folds' factors; prefix and suffix merges give all k of
them with about 3k merges. The held-out squared error of ANY coefficient vector b on fold j is
exact from fold j's own factor: ‖A_j [b; −1]‖² = ‖R_j [b; −1]‖² (see :func:`heldout_sse`).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from tallfit.accumulate.factor import FactorAccumulator
from tallfit.design.categorical import recount_levels
from tallfit.kernels.gather import route_rows
from tallfit.errors import DesignError, SchemaError

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_NULL_CODE = np.uint64(0x6E756C6C6B657921)  # every missing key value shares one group
_STRING_BASE = np.uint64(1_000_003)
_HOLDOUT_STREAM, _FOLD_STREAM = 1, 2


def mix64(x: np.ndarray) -> np.ndarray:
    """SplitMix64 finaliser of uint64 values (wrapping arithmetic, vectorised)."""
    with np.errstate(over="ignore"):
        z = x.astype(np.uint64, copy=True) + _GOLDEN
        z = (z ^ (z >> np.uint64(30))) * _M1
        z = (z ^ (z >> np.uint64(27))) * _M2
        return z ^ (z >> np.uint64(31))


def _string_codes(arr: pa.Array) -> np.ndarray:
    """A uint64 code per string: Σ byte_i · B^i over its UTF-8 bytes (mod 2^64), then its length mixed in."""
    arr = arr.cast(pa.large_binary())
    n = len(arr)
    offsets = np.frombuffer(arr.buffers()[1], dtype=np.int64)[arr.offset : arr.offset + n + 1]
    data_buf = arr.buffers()[2]
    data = np.frombuffer(data_buf, dtype=np.uint8) if data_buf is not None else np.zeros(0, np.uint8)
    start, stop = offsets[0], offsets[-1]
    data = data[start:stop].astype(np.uint64)
    offsets = offsets - start
    lengths = np.diff(offsets)
    if data.size:
        pos = np.arange(data.size) - np.repeat(offsets[:-1], lengths)
        powers = np.ones(int(lengths.max()), dtype=np.uint64)
        with np.errstate(over="ignore"):
            for i in range(1, powers.size):
                powers[i] = powers[i - 1] * _STRING_BASE
            weighted = data * powers[pos]
            csum = np.concatenate([[np.uint64(0)], np.cumsum(weighted, dtype=np.uint64)])
            sums = csum[offsets[1:]] - csum[offsets[:-1]]
    else:
        sums = np.zeros(n, dtype=np.uint64)
    return mix64(sums ^ lengths.astype(np.uint64))


def key_codes(arr: pa.Array | pa.ChunkedArray, column: str) -> np.ndarray:
    """A uint64 code per value of a key column; equal values get equal codes, nulls share one."""
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    t = arr.type
    if pa.types.is_dictionary(t):
        codes_of_dict = key_codes(arr.dictionary, column)
        idx = arr.indices.fill_null(0).to_numpy(zero_copy_only=False).astype(np.int64)
        codes = codes_of_dict[idx] if codes_of_dict.size else np.zeros(len(arr), np.uint64)
    elif pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_binary(t) or pa.types.is_large_binary(t):
        codes = _string_codes(arr)
    elif pa.types.is_floating(t):
        x = arr.cast(pa.float64()).fill_null(0.0).to_numpy(zero_copy_only=False) + 0.0  # -0.0 → 0.0
        codes = np.ascontiguousarray(x).view(np.uint64).copy()
    elif pa.types.is_integer(t) or pa.types.is_boolean(t):
        codes = arr.cast(pa.int64()).fill_null(0).to_numpy(zero_copy_only=False).view(np.uint64).copy()
    elif pa.types.is_temporal(t):
        codes = pc.cast(arr, pa.int64()).fill_null(0).to_numpy(zero_copy_only=False).view(np.uint64).copy()
    else:
        raise SchemaError(
            f"key column {column!r} has type {t}, which cannot group rows into folds; use a column "
            "of integers, strings, dates or timestamps (a host id, a day)"
        )
    if arr.null_count:
        codes[np.asarray(arr.is_null().to_numpy(zero_copy_only=False))] = _NULL_CODE
    return codes


def _unit(codes: np.ndarray, seed: int, stream: int) -> np.ndarray:
    """Uniform numbers in [0, 1) from codes, one independent stream per (seed, stream)."""
    salt = mix64(np.array([seed * 4 + stream], dtype=np.uint64))[0]
    return (mix64(codes ^ salt) >> np.uint64(11)).astype(np.float64) * (1.0 / 9007199254740992.0)


@dataclass(frozen=True)
class FoldPlan:
    """How rows are split: ``folds`` (0 for none, else ≥ 2), a ``holdout`` fraction, keys and a seed."""

    folds: int = 0
    fold_key: str | None = None
    holdout: float = 0.0
    holdout_key: str | None = None
    seed: int = 0

    def __post_init__(self) -> None:
        if isinstance(self.folds, bool) or not isinstance(self.folds, int) or self.folds == 1 or self.folds < 0:
            raise DesignError(f"folds must be 0 (no cross-validation) or an integer of at least 2, got {self.folds!r}")
        if self.folds > 10_000:
            raise DesignError(f"{self.folds} folds is more than the 10000 supported; 5 to 20 folds is usual")
        if not 0.0 <= float(self.holdout) < 1.0:
            raise DesignError(f"the holdout fraction must be in [0, 1), got {self.holdout!r}; e.g. 0.2")
        if isinstance(self.seed, bool) or not isinstance(self.seed, int) or self.seed < 0:
            raise DesignError(f"the split seed must be a non-negative integer, got {self.seed!r}")

    @property
    def key_columns(self) -> list[str]:
        return [c for c in dict.fromkeys([self.fold_key, self.holdout_key]) if c]

    def assign(self, extra: dict[str, pa.Array], positions: np.ndarray) -> tuple[np.ndarray | None, np.ndarray | None]:
        """Holdout mask (or None) and fold ids (or None) of rows with these scan positions / keys."""
        codes: dict[str | None, np.ndarray] = {}

        def codes_for(key: str | None) -> np.ndarray:
            if key not in codes:
                codes[key] = positions.astype(np.uint64) if key is None else key_codes(extra[key], key)
            return codes[key]

        holdout = None
        if self.holdout > 0.0:
            holdout = _unit(codes_for(self.holdout_key), self.seed, _HOLDOUT_STREAM) < self.holdout
        folds = None
        if self.folds >= 2:
            u = _unit(codes_for(self.fold_key), self.seed, _FOLD_STREAM)
            folds = np.minimum((u * self.folds).astype(np.int64), self.folds - 1)
        return holdout, folds

    def to_dict(self) -> dict:
        return {"folds": self.folds, "fold_key": self.fold_key, "holdout": float(self.holdout),
                "holdout_key": self.holdout_key, "seed": self.seed,
                "assignment": "SplitMix64 hash of the key, or of the row position in the scan"}


def _add_counts(into: dict, other: dict) -> dict:
    for name, count in other.items():
        into[name] = into.get(name, 0) + int(count)
    return into


def _part(block, A: np.ndarray):
    """A block holding some of `block`'s used rows: same columns, its own level counts.

    Level counts are recounted from the indicator columns (a row of level L has a non-zero
    entry in column "col[L]", weighted or not), so each fold knows its own levels; read counts,
    drops and fills stay with the whole pass.
    """
    levels = recount_levels(A, block.names, block.level_counts) if block.level_counts else None
    return replace(block, A=A, n_read=A.shape[0], dropped_by_column={}, keep=None, extra={}, col_min=None,
                   col_max=None, weight_sum=None, weight_log_sum=None, level_counts=levels, filled={})


@dataclass
class FoldAccumulators:
    """One factor per fold (a single one when there are no folds) plus the holdout factor.

    Rows dropped for missing values are not assigned to folds; their counts (and the rows read)
    are kept here and credited to the training fit.
    """

    plan: FoldPlan
    folds: list[FactorAccumulator]
    holdout: FactorAccumulator | None
    n_read: int = 0
    dropped_by_column: dict[str, int] = field(default_factory=dict)
    filled: dict[str, int] = field(default_factory=dict)
    missing_keys: dict[str, int] = field(default_factory=dict)

    @classmethod
    def create(cls, names: list[str], plan: FoldPlan) -> "FoldAccumulators":
        k = max(plan.folds, 1)
        return cls(
            plan=plan,
            folds=[FactorAccumulator.create(names) for _ in range(k)],
            holdout=FactorAccumulator.create(names) if plan.holdout > 0 else None,
        )

    @property
    def names(self) -> list[str]:
        return self.folds[0].names

    def update_block(self, block, holdout: np.ndarray | None, fold_ids: np.ndarray | None) -> None:
        """Fold a DesignBlock's used rows into their folds / the holdout (as from ``FoldPlan.assign``)."""
        self.n_read += int(block.n_read)
        _add_counts(self.dropped_by_column, block.dropped_by_column)
        _add_counts(self.filled, getattr(block, "filled", None) or {})
        A = block.A
        if A.shape[0] == 0:
            return
        has_holdout = holdout is not None and bool(holdout.any())
        if fold_ids is None and not has_holdout:
            self.folds[0].update_block(_part(block, A))
            return
        # one sweep routes every row to its fold (or to the holdout, the last group) with each
        # group's column ranges; the routed copy is ours, so it is folded in place
        k = len(self.folds)
        groups = np.zeros(A.shape[0], dtype=np.int64) if fold_ids is None else fold_ids.astype(np.int64)
        if has_holdout:
            groups = np.where(holdout, k, groups)
        S, starts, lo, hi = route_rows(A, groups, k + 1)
        targets = self.folds + ([self.holdout] if has_holdout else [])
        for g, acc in enumerate(targets):
            if starts[g + 1] > starts[g]:
                part = _part(block, S[starts[g] : starts[g + 1]])
                part.col_min, part.col_max = lo[g], hi[g]
                acc.update_block(part, overwrite=True)

    def count_missing_keys(self, column: str, count: int) -> None:
        if count:
            self.missing_keys[column] = self.missing_keys.get(column, 0) + int(count)

    def merge(self, other: "FoldAccumulators") -> "FoldAccumulators":
        """A new set over the rows of both (same plan and design)."""
        if other.plan != self.plan:
            raise ValueError("cannot merge fold accumulators of different splits")
        return FoldAccumulators(
            plan=self.plan,
            folds=[a.merge(b) for a, b in zip(self.folds, other.folds)],
            holdout=None if self.holdout is None else self.holdout.merge(other.holdout),
            n_read=self.n_read + other.n_read,
            dropped_by_column=_add_counts(dict(self.dropped_by_column), other.dropped_by_column),
            filled=_add_counts(dict(self.filled), other.filled),
            missing_keys=_add_counts(dict(self.missing_keys), other.missing_keys),
        )

    @property
    def n_holdout(self) -> int:
        return 0 if self.holdout is None else self.holdout.n_used

    def training(self) -> FactorAccumulator:
        """The factor of every non-holdout row (merge of all folds), with the pass's read/drop counts."""
        acc = self.folds[0]
        for other in self.folds[1:]:
            acc = acc.merge(other)
        acc = replace(acc, n_read=self.n_read - self.n_holdout, dropped_by_column=dict(self.dropped_by_column),
                      filled=dict(self.filled))
        return acc

    def training_factors(self) -> list[FactorAccumulator]:
        """For each fold j, the factor of the other folds (prefix and suffix merges, O(k) merges)."""
        k = len(self.folds)
        if k < 2:
            raise DesignError("cross-validation needs at least 2 folds")
        prefix: list[FactorAccumulator | None] = [None] * (k + 1)
        suffix: list[FactorAccumulator | None] = [None] * (k + 1)
        for j in range(k):
            prefix[j + 1] = self.folds[j] if prefix[j] is None else prefix[j].merge(self.folds[j])
        for j in range(k - 1, -1, -1):
            suffix[j] = self.folds[j] if suffix[j + 1] is None else self.folds[j].merge(suffix[j + 1])
        out = []
        for j in range(k):
            left, right = prefix[j], suffix[j + 1]
            out.append(left.merge(right) if left is not None and right is not None else (left or right))
        return out


def heldout_sse(R: np.ndarray, cols: list[int] | np.ndarray, B: np.ndarray) -> np.ndarray | float:
    """Σ (y − X_cols b)² over the rows behind factor R, for each column b of B (exact, no data).

    R is the k × k factor of [X | y] of the held-out rows; B is (len(cols),) or (len(cols), L).
    """
    B2 = B.reshape(len(cols), -1)
    E = R[:, cols] @ B2 - R[:, -1:]
    out = np.einsum("ij,ij->j", E, E)
    return out if B.ndim > 1 else float(out[0])
