"""Batch → design block for any spec: SQL step, missing-value policies, indicators, weights.

A :class:`Design` is the stateful builder for one pass. In discovery mode (fitting) the columns
of categorical levels are appended as levels appear; in fixed mode (prediction, later passes) it
reproduces the fitted model's final coding. Weighted rows are scaled by √w inside the block, so
the accumulator needs no knowledge of weights beyond the counts the block reports.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

from tallfit.design.categorical import WIDE_LEVELS, LevelCoder
from tallfit.design.numeric import DesignBlock, column_as_float, design_block
from tallfit.design.spec import INTERCEPT, ModelSpec
from tallfit.design.sql import compile_frame
from tallfit.errors import DataSourceError, DesignError


class Design:
    """Builds DesignBlocks for one pass over the data."""

    def __init__(self, spec: ModelSpec, coding: dict | None = None, unseen: str = "error",
                 predicting: bool = False, structured: bool = False, level_codes: bool = False) -> None:
        self.spec = spec
        self.predicting = predicting
        # level_codes (a fixed coding: prediction, the second pass): blocks hold no indicator
        # columns; each categorical comes as the used rows' column codes (block.codes; < 0: no
        # column), for the consumer to look up its rows of β or of a map
        self.level_codes = level_codes and coding is not None
        # structured: blocks hold only [features | y] (no intercept, no indicators, rows not scaled
        # by √w) plus each row's level codes and weight, for the accumulators that exploit the
        # one-hot structure (accumulate/onehot.py, accumulate/absorb.py)
        self.structured = structured and coding is None
        if predicting:  # scoring keeps every row: no filter, no target, no weights
            self.frame = compile_frame(spec.derive, None) if spec.derive else None
        else:
            self.frame = compile_frame(spec.derive, spec.where) if spec.needs_frame else None
        self.coders: list[LevelCoder] = []
        self.fixed_names: list[str] | None = None
        if coding is None:
            self.coders = [LevelCoder(c) for c in spec.categorical]
        else:
            for col in spec.categorical:
                c = coding["columns"][col]
                self.coders.append(
                    LevelCoder(col, fixed=dict(c["column_of"]), n_columns=len(c["columns"]),
                               other=c.get("other_column"), unseen=unseen)
                )
            self.fixed_names = list(coding["names"])
        self.wide_warned: set[str] = set()
        self.filtered_rows = 0

    @property
    def names(self) -> list[str]:
        """Current design column names, target last."""
        if self.fixed_names is not None:
            return self.fixed_names
        if self.structured:
            return [t for t in self.spec.term_names if t != INTERCEPT] + [self.spec.target]
        cat = [n for coder in self.coders for n in coder.names]
        return self.spec.term_names + cat + [self.spec.target]

    def wide_categoricals(self) -> list[str]:
        return [c.column for c in self.coders if c.n_columns > WIDE_LEVELS]

    @property
    def plain(self) -> bool:
        """Numeric features only, default missing policy, no weights: the fast path. In a pass
        after the fit (a fixed coding) an absorbed key is only an extra column read beside."""
        s = self.spec
        absorb = bool(s.absorb) and self.fixed_names is None
        if self.predicting:
            return not (s.categorical or s.derive or s.missing or absorb)
        return not (s.categorical or s.needs_frame or s.weights or s.missing or absorb or s.by)

    # -- one batch ---------------------------------------------------------------------------
    def block(self, batch: pa.RecordBatch, label: str, extra_columns=()) -> DesignBlock:
        """The design block of one batch; `extra_columns` come along restricted to the used rows."""
        if self.plain and not self.structured:
            block = design_block(batch, self.spec)
            block.names = None
            filtered = batch
        else:
            block, filtered = self._general(batch, label)
        if extra_columns:
            inner = block.keep if filtered is batch else block.filtered_keep  # over the filtered rows
            mask = None if inner is None else pa.array(inner)
            for col in extra_columns:
                arr = filtered.column(col)
                block.extra[col] = arr if mask is None else arr.filter(mask)
        return block

    def features(self, batch: pa.RecordBatch, label: str) -> tuple[np.ndarray, np.ndarray, list[np.ndarray]]:
        """Prediction mode: X over every row (zeros where unusable), the mask of usable rows and,
        with ``level_codes``, each categorical's column codes per row (X then holds the columns
        before the indicators; codes < 0: no indicator column)."""
        if self.plain:
            from tallfit.design.numeric import feature_block

            return (*feature_block(batch, self.spec), [])
        block, _ = self._general(batch, label)
        m = block.n_read
        q = block.A.shape[1] - 1
        codes = block.codes if self.level_codes else []
        if block.keep is None or block.A.shape[0] == m:
            return block.A[:, :q], np.ones(m, dtype=bool), codes  # every row usable: the block itself
        ok = block.keep
        X = np.zeros((m, q), order="F")
        for j in range(q):  # column by column: a masked row assignment of the whole block is ≈ 10× slower
            X[ok, j] = block.A[:, j]
        spread = []
        for c in codes:  # back to every row (unusable ones: no column)
            full = np.full(m, -1, dtype=np.int64)
            full[ok] = c
            spread.append(full)
        return X, ok, spread

    def _general(self, batch: pa.RecordBatch, label: str):
        spec = self.spec
        n_read = batch.num_rows
        placed = None  # the filter's kept rows' positions in the batch as read
        if self.frame is not None:
            batch, placed = self.frame.apply(batch, label)
            self.filtered_rows += n_read - batch.num_rows
            if placed is not None and placed.size == n_read:
                placed = None
        m = batch.num_rows

        def row_of(i: int) -> int:  # a row of the filtered batch, by its place in the batch read
            return int(placed[i]) if placed is not None else i
        keep = np.ones(m, dtype=bool)
        dropped: dict[str, int] = {}
        filled: dict[str, int] = {}
        if n_read > m:
            dropped["(where filter)"] = n_read - m

        def bad_rows(col: str, bad: np.ndarray) -> None:
            policy = spec.policy_for(col)
            count = int(bad.sum())
            if policy.action == "fail" or (col == spec.weights):
                first = row_of(int(np.flatnonzero(bad)[0]))
                raise DataSourceError(
                    f"column {col!r} has a missing or non-finite value in {label} (row {first} of "
                    "the batch); fill or drop such rows, or choose another missing-value policy"
                )
            dropped[col] = dropped.get(col, 0) + count
            keep[bad] = False

        numeric = []
        indicators = []
        for col in spec.features:
            v = column_as_float(batch.column(col))
            bad = ~np.isfinite(v)
            if bad.any():
                policy = spec.policy_for(col)
                if policy.action == "fill":
                    v = np.where(bad, policy.value, v)
                    filled[col] = filled.get(col, 0) + int(bad.sum())
                else:
                    bad_rows(col, bad)
            numeric.append(v)
            if spec.policy_for(col).indicator:
                indicators.append(bad.astype(np.float64))

        with_target = not self.predicting
        y = column_as_float(batch.column(spec.target)) if with_target else np.zeros(m)
        bad = ~np.isfinite(y)
        if bad.any():
            bad_rows(spec.target, bad)

        blocks = []
        codes_all = []
        for coder in self.coders:
            codes = coder.codes(batch.column(coder.column), label)
            missing = codes == -2
            if missing.any():
                bad_rows(coder.column, missing)
            codes_all.append(codes)
        if spec.absorb and not self.predicting:  # a row without a key value belongs to no level
            key = batch.column(spec.absorb)
            if key.null_count:
                bad_rows(spec.absorb, key.is_null().to_numpy(zero_copy_only=False))
        w = None
        if spec.weights and not self.predicting:
            w = column_as_float(batch.column(spec.weights))
            bad = ~np.isfinite(w) | (w < 0)
            if bad.any():
                first = int(np.flatnonzero(bad)[0])
                raise DataSourceError(
                    f"weight column {spec.weights!r} has a negative, missing or non-finite value in "
                    f"{label} (row {row_of(first)} of the batch: {w[first]!r}); weights must be finite and >= 0"
                )
            zero = w == 0
            if zero.any():
                dropped["(zero weight)"] = dropped.get("(zero weight)", 0) + int((zero & keep).sum())
                keep &= ~zero
        for coder, codes in zip(self.coders, codes_all):
            if self.structured or self.level_codes:
                continue
            blocks.append(coder.indicators(codes[keep] if not keep.all() else codes))
            if coder.n_columns > WIDE_LEVELS and coder.column not in self.wide_warned:
                self.wide_warned.add(coder.column)

        rows = np.flatnonzero(keep) if not keep.all() else None
        n_rows = m if rows is None else rows.size
        columns = numeric + indicators
        width = (spec.has_intercept_column and not self.structured) + len(columns) + sum(b.shape[1] for b in blocks) + 1
        A = np.empty((n_rows, width), order="F")  # filled column by column: no stacking copies
        j = 0
        if spec.has_intercept_column and not self.structured:
            A[:, 0] = 1.0
            j = 1
        for v in columns:
            A[:, j] = v if rows is None else v[rows]
            j += 1
        for b in blocks:
            A[:, j:j + b.shape[1]] = b
            j += b.shape[1]
        A[:, j] = y if rows is None else y[rows]
        # keep: the used rows among the rows read (the filter's rows out too), so a row is named by
        # its place in the file; the extra columns come from the filtered batch (block())
        used = None if rows is None else keep
        if placed is not None:
            used = np.zeros(n_read, dtype=bool)
            used[placed if rows is None else placed[rows]] = True
        block = DesignBlock(A=A, n_read=n_read, dropped_by_column=dropped, keep=used)
        block.filtered_keep = None if rows is None else keep
        block.names = list(self.names)
        block.filled = filled
        if A.shape[0] and not self.predicting:  # the column ranges serve the fit and its passes
            block.col_min = A.min(axis=0)
            block.col_max = A.max(axis=0)
        if w is not None:
            wk = w if rows is None else w[rows]
            block.weight_sum = float(wk.sum())
            block.weight_log_sum = float(np.log(wk).sum())
            block.row_weights = wk
            if not self.structured:
                np.multiply(A, np.sqrt(wk)[:, None], out=A)
        if self.level_codes or self.structured:
            block.codes = [codes if rows is None else codes[rows] for codes in codes_all]
            block.level_sizes = [coder.n_columns for coder in self.coders]  # levels known so far
        if self.coders and self.fixed_names is None:
            block.level_counts = {}
            for coder, codes in zip(self.coders, codes_all):
                kept = codes if rows is None else codes[rows]
                counts = np.bincount(kept[kept >= 0], minlength=coder.n_columns)
                levels = list(coder.index)
                block.level_counts[coder.column] = {levels[i]: int(c) for i, c in enumerate(counts) if c}
        return block, batch


def prediction_columns(spec: ModelSpec) -> list[str]:
    """Columns scoring reads: the inputs of the terms only (no target, weights or filter)."""
    from tallfit.design.sql import sql_inputs

    derived = set(spec.derived_names)
    cols = [f for f in spec.features if f not in derived]
    cols += list(sql_inputs(spec.derive, None)) if spec.derive else []
    cols += list(spec.categorical)
    cols += [spec.absorb] if spec.absorb else []
    return [c for c in dict.fromkeys(cols) if c not in derived]


def check_design_columns(spec: ModelSpec, schema: pa.Schema, where: str, predicting: bool = False) -> None:
    """Validate every column a spec reads, with messages that point at the option involved."""
    from tallfit.design.spec import check_columns, check_present

    frame_where = None if predicting else spec.where
    frame = compile_frame(spec.derive, frame_where) if (spec.derive or frame_where) else None
    if frame is not None:
        frame.check(schema, where)
    derived = set(spec.derived_names)
    numeric = list(spec.features) if predicting else spec.numeric_columns
    raw_numeric = [c for c in numeric if c not in derived]
    check_columns(schema, raw_numeric, None if predicting else spec.target, where)
    extra = list(spec.categorical) + ([spec.absorb] if spec.absorb else [])
    if not predicting:
        extra += [c for c in (spec.weights,) if c] + list(spec.by)
    check_present(schema, extra, where)
    if spec.weights and not predicting:
        check_columns(schema, [spec.weights], None, where)
    for col in spec.categorical:
        t = schema.field(col).type
        if pa.types.is_floating(t):
            continue  # whole-number floats are accepted and checked per batch
        if not (pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_integer(t)
                or pa.types.is_boolean(t) or pa.types.is_dictionary(t)):
            raise DesignError(f"column {col!r} in {where} has type {t}, which cannot be categorical")
    if INTERCEPT in spec.features:
        raise DesignError(f"{INTERCEPT!r} is a reserved term name")
