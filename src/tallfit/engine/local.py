"""The local engine: streams a source through the design into accumulators, one or more passes.

This is the only layer that decides how batches are scheduled (here: one reader thread a few
batches ahead of the thread that folds them); everything above it sees whole passes.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator

import numpy as np
import pyarrow as pa

from tallfit.accumulate.factor import FactorAccumulator
from tallfit.design.numeric import DesignBlock, design_block
from tallfit.design.design import Design, check_design_columns
from tallfit.design.pushdown import pruner
from tallfit.design.spec import ModelSpec
from tallfit.engine.prefetch import prefetched
from tallfit.errors import ColumnNotFoundError, DataSourceError, TallfitError
from tallfit.inputs import source_label

DEFAULT_BATCH_ROWS = 65_536

ProgressHook = Callable[[int, int], None]  # (rows in this batch, file index)


def span_label(source, file_index: int, row_start: int, n_rows: int) -> str:
    """How messages name a stretch of rows: the file (or the data set) and the row range."""
    files = getattr(source, "files", [])
    name = files[file_index].path if 0 <= file_index < len(files) else source.describe()
    return f"{name}, rows {row_start}-{row_start + n_rows - 1}"


def chunk_label(source, chunk) -> str:
    return span_label(source, chunk.file_index, chunk.row_start, chunk.batch.num_rows)


def design_blocks(
    source,
    spec: ModelSpec,
    batch_rows: int = DEFAULT_BATCH_ROWS,
    progress: ProgressHook | None = None,
    extra_columns: tuple[str, ...] | list[str] = (),
    coding: dict | None = None,
    unseen: str = "error",
    design: Design | None = None,
    pool=None,
    prefetch: int = 2,
    level_codes: bool = False,
) -> Iterator[DesignBlock]:
    """Design blocks for every batch of the source, decoded one thread ahead of the caller.

    ``extra_columns`` (a fold key, a cluster id, pass-through ids) are read in the same scan and
    handed over in ``block.extra`` as Arrow arrays restricted to the used rows. Each block also
    carries where it came from (``file_index``, ``row_start``) for messages. ``coding`` (a fitted
    model's categorical coding) fixes the columns for passes after the fit; without it, levels
    are discovered. Pass ``design`` to read its state (e.g. filtered-row counts) afterwards.
    ``pool`` (engine.parallel.BufferPool) lends reusable matrices to plain numeric designs; the
    consumer then hands each ``block.A`` back with ``pool.give`` once it is done with it.
    ``prefetch``: blocks decoded ahead in the reader thread (0: no reader thread; the caller's
    thread decodes, for callers that run one such loop per core). ``level_codes``: with a
    ``coding``, categoricals as per-row column codes instead of indicator columns (Design).
    """
    where = source_label(source)
    design = design or Design(spec, coding=coding, unseen=unseen, level_codes=level_codes)
    check_design_columns(spec, source.schema, where)
    for col in extra_columns:
        if col not in source.schema.names:
            raise ColumnNotFoundError(col, source.schema.names, where=where)
    extra = [c for c in dict.fromkeys(extra_columns) if c not in spec.input_columns]
    read = spec.input_columns + extra
    skip = pruner(spec.where) if not design.predicting else None
    prune = {"prune": skip} if skip is not None else {}

    def produce() -> Iterator[DesignBlock]:
        for chunk in source.batches(read, batch_rows, **prune):
            block = _block_of(chunk, chunk_label(source, chunk), design, spec, pool, extra_columns)
            block.file_index, block.row_start = chunk.file_index, chunk.row_start
            if progress is not None:
                progress(chunk.batch.num_rows, chunk.file_index)
            yield block

    parts = _ordered_parts(source, design, prefetch, skip)
    if parts is not None:
        return _parts_in_order(parts, spec, batch_rows, progress, read, extra_columns, coding, unseen,
                               design, pool, prefetch)
    return prefetched(produce(), depth=prefetch)


def _ordered_parts(source, design: Design, prefetch: int, skip) -> list | None:
    """Row-group parts of a plain design's source for decoding on every core, or None."""
    from tallfit.engine.parallel import source_parts, worker_count

    if prefetch <= 0 or skip is not None or not design.plain or design.structured or worker_count(None) < 2:
        return None
    return source_parts(source, span_rows=1)


def _parts_in_order(parts, spec, batch_rows, progress, read, extra_columns, coding, unseen, design, pool,
                    depth) -> Iterator[DesignBlock]:
    """design_blocks of a plain design, its parts decoded by one thread per core, in stream order.

    A plain design keeps no state across batches, so each part gets a Design of its own and the
    blocks are those of a serial pass, in the same order (SGD epochs are unchanged)."""
    import threading

    from tallfit.engine.parallel import worker_count
    from tallfit.engine.prefetch import prefetched_in_order

    lock = threading.Lock()
    workers = worker_count(None)

    def producer(sub, file_index: int):
        def run() -> Iterator[DesignBlock]:
            sub.decode_threads = False  # one decoding thread per core already
            mine = Design(spec, coding=coding, unseen=unseen, predicting=design.predicting)
            for chunk in sub.batches(read, batch_rows):
                block = _block_of(chunk, chunk_label(sub, chunk), mine, spec, pool, extra_columns)
                block.file_index, block.row_start = file_index, chunk.row_start
                if progress is not None:
                    with lock:
                        progress(chunk.batch.num_rows, file_index)
                yield block
        return run

    return prefetched_in_order([producer(sub, i) for sub, i in parts], workers, depth=depth)


def _block_of(chunk, label: str, design: Design, spec: ModelSpec, pool, extra_columns) -> DesignBlock:
    """The design block of one chunk (in a pooled buffer when the design is plain), conversion
    failures reported with the chunk's file and rows."""
    try:
        if pool is not None and design.plain:
            return _pooled_block(chunk.batch, spec, pool, extra_columns)
        return design.block(chunk.batch, label, extra_columns)
    except TallfitError:
        raise
    except (pa.ArrowException, ValueError, TypeError) as exc:
        raise DataSourceError(f"cannot convert {label} to numbers: {exc}") from None


def _pooled_block(batch, spec: ModelSpec, pool, extra_columns=()) -> DesignBlock:
    """The plain design of one batch, filled into a pooled buffer (given back at once if rows were
    dropped), with the extra columns restricted to the used rows."""
    k = len(spec.numeric_columns) + (1 if spec.has_intercept_column else 0)
    buf = pool.take((batch.num_rows, k))
    block = design_block(batch, spec, out=buf)
    if block.A is not buf:
        pool.give(buf)
    block.names = None
    mask = None if block.keep is None else pa.array(block.keep)
    for col in extra_columns:
        arr = batch.column(col)
        block.extra[col] = arr if mask is None else arr.filter(mask)
    return block


def accumulate(
    source,
    spec: ModelSpec,
    batch_rows: int = DEFAULT_BATCH_ROWS,
    progress: ProgressHook | None = None,
    design: Design | None = None,
    *,
    workers: int | None = None,
    method: str = "qr",
) -> FactorAccumulator:
    """One pass: the triangular factor of [X | y] with counts and ranges (levels discovered).

    With an absorbed key the result is an AbsorbAccumulator (within-level factor + level stats).
    ``workers`` threads fold in parallel (default: every core; see engine/parallel.py) and
    ``method`` picks the stable factor ("qr"), the Gram fast path ("gram") or the Gram path with
    a stable fallback when it is unsafe ("auto"); see engine/passes.py.
    """
    if spec.absorb:
        from tallfit.accumulate.absorb import AbsorbAccumulator

        absorbed = AbsorbAccumulator(spec.absorb, spec.term_names + [spec.target])
        blocks = design_blocks(source, spec, batch_rows, progress, extra_columns=[spec.absorb], design=design)
        for block in blocks:
            absorbed.update_block(block, block.extra[spec.absorb], span_label(source, block.file_index, block.row_start, block.n_read))
        count_pruned(source, absorbed.inner)
        return absorbed
    from tallfit.engine.passes import factor_pass

    acc = factor_pass(source, spec, batch_rows, progress, design, workers=workers, method=method)
    count_pruned(source, acc)
    return acc


def count_pruned(source, acc) -> None:
    """Rows of Parquet row groups skipped by the --where statistics count as read and filtered."""
    pruned = int(getattr(source, "pruned_rows", 0) or 0)
    if pruned:
        acc.n_read += pruned
        acc.dropped_by_column["(where filter)"] = acc.dropped_by_column.get("(where filter)", 0) + pruned


def residual_products_pass(
    source,
    spec: ModelSpec,
    keep: list[int],
    b_hi: np.ndarray,
    b_lo: np.ndarray,
    batch_rows: int = DEFAULT_BATCH_ROWS,
    progress: ProgressHook | None = None,
    coding: dict | None = None,
) -> tuple[np.ndarray, float]:
    """One pass: Xᵀ(y − Xb) and ‖y − Xb‖², accumulated in double-double over the used rows. On a
    dask cluster (engine.cluster) each part's sums are made by a worker and merged in part order
    in double-double (kernels.compensated.dd_add)."""
    from tallfit.engine.cluster import current
    from tallfit.engine.parallel import source_parts

    run = current()
    parts = source_parts(source) if run is not None else None
    if parts is not None:
        g_hi, g_lo, ss = run.map_merge(residual_products_part, [sub for sub, _ in parts], _merge_products, "chain",
                                       progress=progress, places=parts, spec=spec, keep=list(keep), b_hi=b_hi,
                                       b_lo=b_lo, batch_rows=batch_rows, coding=coding)
    else:
        g_hi, g_lo, ss = _residual_products(design_blocks(source, spec, batch_rows, progress, coding=coding),
                                            len(keep), keep, b_hi, b_lo)
    return g_hi + g_lo, float(ss[0] + ss[1])


def _residual_products(blocks, p: int, keep, b_hi, b_lo) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    from tallfit.kernels.compensated import accumulate_residual_products

    g_hi, g_lo, ss = np.zeros(p), np.zeros(p), np.zeros(2)
    for block in blocks:
        if block.n_used == 0:
            continue
        X = np.asfortranarray(block.A[:, keep])
        y = np.ascontiguousarray(block.A[:, -1])
        accumulate_residual_products(X, y, b_hi, b_lo, g_hi, g_lo, ss)
    return g_hi, g_lo, ss


def residual_products_part(sub, spec: ModelSpec, keep: list[int], b_hi, b_lo, batch_rows: int, coding=None):
    """One part's double-double sums (g_hi, g_lo, ss) of ``residual_products_pass``, for a cluster worker."""
    from tallfit.engine.cluster import PART_READERS
    from tallfit.engine.parallel import read_part

    blocks = design_blocks(sub, spec, batch_rows, coding=coding, prefetch=read_part(sub, PART_READERS))
    return _residual_products(blocks, len(keep), keep, b_hi, b_lo)


def _merge_products(a, b):
    from tallfit.kernels.compensated import dd_add

    g_hi, g_lo = dd_add(a[0], a[1], b[0], b[1])
    s_hi, s_lo = dd_add(a[2][:1], a[2][1:], b[2][:1], b[2][1:])
    return g_hi, g_lo, np.concatenate([s_hi, s_lo])
