"""Per-group models (``by``): one model per value of the grouping columns, all in one pass.

Each group gets its own factor accumulator, filled from the same scan (memory O(groups × k²),
guarded by a budget). Groups with too few rows, or whose terms are aliased, are listed with the
reason instead of stopping the whole fit. The model file holds every group, and prediction
routes each row to its group's model.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from tallfit.accumulate.factor import FactorAccumulator
from tallfit.design.categorical import level_strings
from tallfit.design.spec import indicator_name
from tallfit.errors import DesignError
from tallfit.results import FitResult

KEY_SEP = " | "
DEFAULT_MEMORY_BUDGET = 2 << 30  # bytes of factors; common practice for a modest server


def group_keys(columns: list[pa.Array]) -> pa.Array:
    """One string key per row from the grouping columns (nulls give a null key)."""
    strings = [level_strings(c) for c in columns]
    if len(strings) == 1:
        return strings[0]
    return pc.binary_join_element_wise(*strings, KEY_SEP, null_handling="emit_null")


def group_rows(columns: list[pa.Array]):
    """(key, row indices in row order) of each distinct key of the grouping columns, nulls last as
    the key None: one dictionary encoding and one stable sort, not a filter per group."""
    keys: list = []
    codes = group_codes(columns, lambda key: keys.append(key) or len(keys) - 1)
    groups = np.where(codes < 0, len(keys), codes)
    order = np.argsort(groups, kind="stable")
    ends = np.cumsum(np.bincount(groups, minlength=len(keys) + 1))
    for g, key in enumerate(keys + [None]):
        idx = order[(ends[g - 1] if g else 0): ends[g]]
        if idx.size:
            yield key, idx


def group_codes(columns: list[pa.Array], slot_of) -> np.ndarray:
    """Each row's group slot from the grouping columns: ``slot_of(key)`` once per distinct key of
    the batch (−1: no group; a missing key is −1 too)."""
    keys = pc.dictionary_encode(group_keys(columns))
    if isinstance(keys, pa.ChunkedArray):
        keys = keys.combine_chunks()
    slots = np.asarray([slot_of(k) for k in keys.dictionary.to_pylist()] + [-1], dtype=np.int64)
    return slots[keys.indices.fill_null(len(keys.dictionary)).to_numpy(zero_copy_only=False).astype(np.int64)]


def group_filter(by: list[str], key: str, schema: pa.Schema) -> str:
    """An SQL condition that selects the rows of group ``key`` (spelt as group_keys spells it)."""
    parts = key.split(KEY_SEP) if len(by) > 1 else [key]
    if len(parts) != len(by):
        raise DesignError(f"group {key!r} does not split into one value per grouping column ({', '.join(by)})")
    conds = []
    for col, part in zip(by, parts):
        t = schema.field(col).type if col in schema.names else pa.string()
        t = t.value_type if pa.types.is_dictionary(t) else t
        name = '"' + col.replace('"', '""') + '"'
        if pa.types.is_string(t) or pa.types.is_large_string(t):
            conds.append(f"{name} = '" + part.replace("'", "''") + "'")
        elif pa.types.is_boolean(t) and part in ("true", "false"):
            conds.append(f"{name} = {part}")
        elif part.lstrip("-").isdigit():  # an integer, or a whole number in a float column
            conds.append(f"{name} = {int(part)}")
        else:
            raise DesignError(f"group {key!r}: {part!r} is not a value of column {col!r} ({t})")
    return " AND ".join(conds)


@dataclass
class GroupedFit:
    """Models per group, the groups that could not be fitted, and how the groups were formed."""

    by: list[str]
    groups: dict[str, FitResult]
    failed: dict[str, str] = field(default_factory=dict)
    rows: dict[str, int] = field(default_factory=dict)
    options: dict[str, Any] = field(default_factory=dict)
    n_read: int = 0
    n_used: int = 0
    dropped_by_column: dict[str, int] = field(default_factory=dict)
    source: dict[str, Any] = field(default_factory=dict)

    @property
    def spec(self):
        return next(iter(self.groups.values())).spec if self.groups else None

    def to_dict(self) -> dict[str, Any]:
        return {
            "by": list(self.by),
            "groups": [
                {"key": k, "n_used": r.inference.n_used, "r_squared": r.inference.r_squared,
                 "residual_std": r.inference.residual_std, "terms": r.term_table(), "robust": r.robust}
                for k, r in self.groups.items()
            ],
            "failed": [{"key": k, "rows": self.rows.get(k, 0), "reason": v} for k, v in self.failed.items()],
            "n_read": self.n_read,
            "n_used": self.n_used,
            "dropped_rows": {"total": self.n_read - self.n_used, "by_column": dict(self.dropped_by_column)},
            "source": self.source,
        }

    def group(self, key: str, schema: pa.Schema) -> FitResult:
        """Group ``key``'s model, its row filter narrowed to that group's rows (for a second pass
        over data that holds every group: robust errors and residual checks of that group)."""
        from dataclasses import replace

        if key not in self.groups:
            why = f" ({self.failed[key]})" if key in self.failed else ""
            shown = ", ".join(repr(k) for k in list(self.groups)[:8]) + (", …" if len(self.groups) > 8 else "")
            raise DesignError(f"no model for group {key!r}{why}; the groups with a model are {shown}")
        model = self.groups[key]
        cond = group_filter(self.by, key, schema)
        where = f"({model.spec.where}) AND {cond}" if model.spec.where else cond
        return replace(model, spec=replace(model.spec, where=where))

    def summary(self) -> str:
        from tallfit.render.groups import render_groups

        return render_groups(self)

    def save(self, path) -> None:
        from tallfit.modelfile import save_grouped

        save_grouped(self, path)

    def predict(self, data, **kwargs):
        from tallfit.scoring import predict

        return predict(self, data, **kwargs)


#: A group with at least this many rows in a block gets a Householder fold of its own; the others
#: share one Givens sweep (measured at k = 8: ≈ 135 ns per row by Givens against ≈ 30 µs per call
#: plus ≈ 20 ns per row by LAPACK).
HOUSEHOLDER_ROWS = 256


class GroupAccumulators:
    """A factor per group key, created on first sight, within a memory budget.

    The groups' triangles live in one stack (groups × k × k) that each block's rows are folded
    into by one Givens sweep (kernels/givens.py; groups with many rows in the block by a
    Householder fold each), with each group's column ranges, row counts,
    weight sums and rows per categorical level beside it; ``accumulator(key)`` gives one as a
    FactorAccumulator. (One Householder fold per group and block cost ≈ 100 µs each: 2,000 groups
    over 10^7 rows took 27 s.)"""

    def __init__(self, names: list[str], by: list[str], budget: int = DEFAULT_MEMORY_BUDGET) -> None:
        self.names = list(names)
        self.by = by
        self.budget = budget
        self.slots: dict[str, int] = {}
        self._alloc(16, len(self.names))
        self.levels: dict[str, dict[str, None]] = {}  # categorical levels met, per column
        self.weighted = False
        self.null_rows = 0
        self.n_read = 0
        self.n_used = 0
        self.dropped: dict[str, int] = {}

    _PER_GROUP = ("R", "col_min", "col_max", "nonzero", "rows", "wsum", "wlog")

    def _alloc(self, cap: int, k: int) -> None:
        self.R = np.zeros((cap, k, k))
        self.col_min = np.full((cap, k), np.inf)
        self.col_max = np.full((cap, k), -np.inf)
        self.nonzero = np.zeros((cap, k), dtype=np.int64)
        self.rows = np.zeros(cap, dtype=np.int64)
        self.wsum = np.zeros(cap)
        self.wlog = np.zeros(cap)

    def _check_budget(self, k: int) -> None:
        need = len(self.slots) * k * k * 8
        if need > self.budget:
            raise DesignError(
                f"grouping by {', '.join(self.by)} has reached {len(self.slots):,} groups, whose factors "
                f"would need more than {self.budget / 2**30:.1f} GiB; group by coarser columns, or "
                "absorb a high-cardinality key instead of fitting a model per value"
            )

    def _grow(self, groups: int) -> None:
        cap = self.R.shape[0]
        if groups <= cap:
            return
        old = [getattr(self, name) for name in self._PER_GROUP]
        self._alloc(max(groups, 2 * cap), len(self.names))
        for name, was in zip(self._PER_GROUP, old):
            getattr(self, name)[:cap] = was

    def _expand(self, names: list[str]) -> None:
        """Every group's factor in the columns ``names`` (a superset: new columns are zero, as in
        FactorAccumulator.expand; old ones in another order are re-triangularised, as in
        FactorAccumulator.aligned)."""
        index = {n: i for i, n in enumerate(names)}
        pos = np.asarray([index[n] for n in self.names])
        cap, k = self.R.shape[0], len(names)
        R, lo, hi, nz = np.zeros((cap, k, k)), np.full((cap, k), np.inf), np.full((cap, k), -np.inf), \
            np.zeros((cap, k), dtype=np.int64)
        R[:, pos[:, None], pos[None, :]] = self.R  # the same Gram, zeros in the new columns
        if np.any(np.diff(pos) <= 0):  # another part met the levels in another order: re-triangularise
            for g in range(len(self.slots)):
                R[g] = np.triu(np.linalg.qr(R[g], mode="r"))
        lo[:, pos], hi[:, pos], nz[:, pos] = self.col_min, self.col_max, self.nonzero
        self.R, self.col_min, self.col_max, self.nonzero = R, lo, hi, nz
        self.names = list(names)

    def update_block(self, block) -> None:
        from tallfit.kernels.givens import fold_rows_by_group
        from tallfit.kernels.tsqr import fold_rows

        names = block.names or self.names
        if names != self.names:
            self._expand(names)
        def slot_of(key: str) -> int:  # a new group gets the next slot, within the budget
            slot = self.slots.get(key)
            if slot is None:
                slot = self.slots[key] = len(self.slots)
                self._check_budget(len(names))
            return slot

        codes = group_codes([block.extra[c] for c in self.by], slot_of)
        self._grow(len(self.slots))
        self.null_rows += int(np.count_nonzero(codes < 0))
        seen = codes >= 0
        counts = np.bincount(codes[seen], minlength=self.R.shape[0])
        self.rows += counts
        big = np.flatnonzero(counts >= HOUSEHOLDER_ROWS)
        if big.size:  # groups with many rows here: one Householder fold each (LAPACK, blocked)
            small = codes.copy()
            for g in big:
                rows = np.flatnonzero(codes == g)
                A = np.asfortranarray(block.A[rows])
                self.R[g] = fold_rows(self.R[g], A)
                np.minimum(self.col_min[g], A.min(axis=0), out=self.col_min[g])
                np.maximum(self.col_max[g], A.max(axis=0), out=self.col_max[g])
                self.nonzero[g] += np.count_nonzero(A, axis=0)
                small[rows] = -1
            codes_small = small
        else:
            codes_small = codes
        fold_rows_by_group(self.R, block.A, codes_small, self.col_min, self.col_max, self.nonzero)
        weights = getattr(block, "row_weights", None)
        if weights is not None:  # rows are already scaled by √w; the sums serve the df
            self.weighted = True
            self.wsum += np.bincount(codes[seen], weights=weights[seen], minlength=self.R.shape[0])
            self.wlog += np.bincount(codes[seen], weights=np.log(weights[seen]), minlength=self.R.shape[0])
        self.n_read += block.n_read
        self.n_used += block.A.shape[0]
        for name, count in block.dropped_by_column.items():
            self.dropped[name] = self.dropped.get(name, 0) + count
        for col, counts in (block.level_counts or {}).items():  # rows per level: the indicator's non-zeros
            known = self.levels.setdefault(col, {})
            for lvl in counts:
                known[lvl] = None

    def accumulator(self, key: str) -> FactorAccumulator:
        """Group ``key``'s factor and counts."""
        g = self.slots[key]
        index = {n: i for i, n in enumerate(self.names)}
        levels = {}
        for col, lvls in self.levels.items():
            d = levels[col] = {}
            for lvl in lvls:
                j = index.get(indicator_name(col, lvl))
                if j is not None and self.nonzero[g, j]:
                    d[lvl] = int(self.nonzero[g, j])
        n = int(self.rows[g])
        return FactorAccumulator(
            names=list(self.names), R=np.asfortranarray(self.R[g]), n_read=n, n_used=n,
            col_min=self.col_min[g].copy(), col_max=self.col_max[g].copy(),
            weight_sum=float(self.wsum[g]) if self.weighted else None,
            weight_log_sum=float(self.wlog[g]) if self.weighted else None, level_counts=levels,
        )

    def merge(self, other: "GroupAccumulators") -> "GroupAccumulators":
        """The groups of the rows of both (those of the rows that follow: ``other``); a group in
        both gets the merged factor (kernels.tsqr.merge_factors)."""
        from tallfit.kernels.tsqr import merge_factors

        names = list(dict.fromkeys(self.names[:-1] + other.names[:-1])) + [self.names[-1]]
        out = GroupAccumulators(names, self.by, self.budget)
        for part in (self, other):
            if part.names != names:
                part = part._copy()
                part._expand(names)
            for key, g in part.slots.items():
                slot = out.slots.get(key)
                if slot is None:
                    slot = out.slots[key] = len(out.slots)
                    out._check_budget(len(names))
                    out._grow(len(out.slots))
                    out.R[slot] = part.R[g]
                else:
                    out.R[slot] = merge_factors(out.R[slot], part.R[g])
                out.col_min[slot] = np.minimum(out.col_min[slot], part.col_min[g])
                out.col_max[slot] = np.maximum(out.col_max[slot], part.col_max[g])
                out.nonzero[slot] += part.nonzero[g]
                out.rows[slot] += part.rows[g]
                out.wsum[slot] += part.wsum[g]
                out.wlog[slot] += part.wlog[g]
            for col, lvls in part.levels.items():
                out.levels.setdefault(col, {}).update(lvls)
            out.weighted |= part.weighted
            out.null_rows += part.null_rows
            out.n_read += part.n_read
            out.n_used += part.n_used
            for name, count in part.dropped.items():
                out.dropped[name] = out.dropped.get(name, 0) + count
        return out

    def _copy(self) -> "GroupAccumulators":
        import copy

        return copy.deepcopy(self)


def groups_part(sub, spec, batch_rows: int, budget: int, readers: int = 2, progress=None) -> GroupAccumulators:
    """One part's group factors (a cluster worker's share of the pass; ``readers``: how many read
    parts at once, see engine.parallel.read_part)."""
    from tallfit.design.design import Design
    from tallfit.engine.local import design_blocks
    from tallfit.engine.parallel import read_part

    groups = GroupAccumulators(spec.term_names + [spec.target], list(spec.by), budget)
    for block in design_blocks(sub, spec, batch_rows, progress, extra_columns=list(spec.by), design=Design(spec),
                               prefetch=read_part(sub, readers)):
        groups.update_block(block)
    return groups


def _group_pass(source, spec, batch_rows: int, progress, design, budget: int) -> GroupAccumulators:
    """The factors of every group: one stream, decoded a thread ahead; on a dask cluster the parts
    of the data set on its workers, merged part after part. (Parts on local threads measured
    slower with many groups: the per-group loop holds the GIL; 2,000 groups × 10^7 rows took 50 s
    against 27 s in one stream, 5 groups 1.8 s against 2.4 s.)"""
    from tallfit.engine.cluster import current
    from tallfit.engine.local import design_blocks
    from tallfit.engine.parallel import source_parts

    cluster = current()
    parts = source_parts(source) if cluster is not None else None
    if parts is not None:
        return cluster.map_merge(groups_part, [sub for sub, _ in parts], lambda a, b: a.merge(b), "chain",
                                 progress=progress, places=parts, spec=spec, batch_rows=batch_rows, budget=budget)
    groups = GroupAccumulators(spec.term_names + [spec.target], list(spec.by), budget)
    for block in design_blocks(source, spec, batch_rows, progress, extra_columns=list(spec.by), design=design):
        groups.update_block(block)
    return groups


def fit_groups(source, spec, batch_rows, progress, design, finalize, budget: int = DEFAULT_MEMORY_BUDGET) -> GroupedFit:
    """One pass filling a factor per group, then a model per group (``finalize(acc) -> FitResult``)."""
    groups = _group_pass(source, spec, batch_rows, progress, design, budget)
    fitted: dict[str, FitResult] = {}
    failed: dict[str, str] = {}
    rows = {}
    for key in sorted(groups.slots):
        acc = groups.accumulator(key)
        rows[key] = acc.n_used
        try:
            fitted[key] = finalize(acc)
        except DesignError as exc:
            failed[key] = str(exc)
    if not fitted:
        detail = "; ".join(f"{k}: {v}" for k, v in list(failed.items())[:3])
        raise DesignError(f"no group could be fitted ({len(failed)} groups; {detail})")
    dropped = dict(groups.dropped)
    if groups.null_rows:
        dropped["(missing group key)"] = groups.null_rows
    return GroupedFit(
        by=list(spec.by), groups=fitted, failed=failed, rows=rows,
        n_read=groups.n_read, n_used=groups.n_used - groups.null_rows, dropped_by_column=dropped,
    )
