"""The factor pass for designs with categorical columns or an absorbed key, exploiting the one-hot
structure: blocks carry only [features | y] and level codes (Design(structured=True)); cells of
the categorical columns (accumulate/onehot.py) or the absorbed key's levels (accumulate/absorb.py)
keep per-level statistics, and the factor of the dense indicator design is formed after the pass.

A data set of several parts (files, runs of Parquet row groups: ``Source.parts``) is read on
every core: each part gets its own Design and accumulator, and the part accumulators are merged
in part order (levels matched by label), so the answer is the same, bit for bit, whatever the
number of workers. Memory: O(levels × features) per accumulator alive, that is per worker plus
the running merge and parts finished ahead of their turn. One stream otherwise, decoded one
thread ahead of the thread that accumulates.
"""

from __future__ import annotations

import threading

import numpy as np

from tallfit.accumulate.factor import FactorAccumulator
from tallfit.accumulate.onehot import MAX_CELLS, MAX_COLUMNS, CellAccumulator, count_block
from tallfit.design.categorical import shared_labels
from tallfit.design.design import Design
from tallfit.design.spec import ModelSpec, indicator_name
from tallfit.kernels.tsqr import fold_rows


#: Parts are runs of whole Parquet row groups of at least this many rows: every part's accumulator
#: holds statistics of up to every level, so fewer, longer parts than the numeric pass's make for
#: fewer merges (each costs O(levels × features)) while still giving every worker several parts.
SPAN_ROWS = 1 << 20


def structured_applies(spec: ModelSpec) -> bool:
    """Whether the pass can keep level statistics instead of dense indicator columns."""
    if spec.by:
        return False
    return bool(spec.absorb) or 0 < len(spec.categorical) <= MAX_COLUMNS


def _dense(block, design: Design, at_least: list[int]) -> tuple[np.ndarray, list[str]]:
    """The dense design rows [1 | X | D | y]·√w of a structured block (after a fallback) and
    their names, with the levels known when the block was made (the reader runs ahead), but at
    least ``at_least`` levels per column (those the factor already has)."""
    spec = design.spec
    A = block.A
    parts = [np.ones((A.shape[0], 1))] if spec.has_intercept_column else []
    parts.append(A[:, :-1])
    cat = []
    for coder, codes, size, least in zip(design.coders, block.codes, block.level_sizes, at_least):
        size = max(size, least)
        M = np.zeros((A.shape[0], size))
        M[np.arange(A.shape[0]), codes] = 1.0
        parts.append(M)
        cat += [indicator_name(coder.column, lvl) for lvl in list(coder.index)[:size]]
    parts.append(A[:, -1:])
    D = np.asfortranarray(np.hstack(parts))
    w = getattr(block, "row_weights", None)
    if w is not None:
        D *= np.sqrt(w)[:, None]
    return D, spec.term_names + cat + [spec.target]


def structured_pass(source, spec: ModelSpec, batch_rows: int, progress, design: Design | None = None,
                    workers: int | None = None):
    """One pass; returns an AbsorbAccumulator (absorbed key) or a FactorAccumulator (the dense
    indicator design's factor, levels discovered while streaming)."""
    from tallfit.engine.parallel import source_parts

    parts = source_parts(source, SPAN_ROWS)
    if parts is None:
        acc = _stream_pass(source, spec, batch_rows, progress, design or Design(spec, structured=True))
    else:
        acc = _parts_pass(parts, spec, batch_rows, progress, workers)
    return acc.to_factor() if isinstance(acc, CellAccumulator) else acc


def _parts_pass(parts, spec: ModelSpec, batch_rows: int, progress, workers: int | None):
    """Every part on its own (W threads), merged in part order as each finishes its turn."""
    from tallfit.engine.cluster import current
    from tallfit.engine.parallel import OrderedMerge, offset_progress, read_part, run_tasks, worker_count

    cluster = current()
    if cluster is not None:  # each part on a cluster worker, merged there part after part
        return cluster.map_merge(levels_part, [sub for sub, _ in parts], _merge, "chain", progress=progress,
                                 places=parts, spec=spec, batch_rows=batch_rows)
    w = worker_count(workers)
    lock = threading.Lock()
    fold = OrderedMerge(_merge)

    def task(index: int, sub, file_index: int):
        def run() -> None:
            hook = offset_progress(progress, file_index, lock)
            acc = _stream_pass(sub, spec, batch_rows, hook, Design(spec, structured=True),
                               prefetch=read_part(sub, w))
            fold.put(index, acc)
        return run

    with shared_labels():  # parts starting from the same label dictionary hash it once
        run_tasks([task(i, sub, f) for i, (sub, f) in enumerate(parts)], w)
    return fold.result()


def levels_part(sub, spec: ModelSpec, batch_rows: int):
    """One part's level statistics, read by a cluster worker."""
    from tallfit.engine.cluster import PART_READERS
    from tallfit.engine.parallel import read_part

    return _stream_pass(sub, spec, batch_rows, None, Design(spec, structured=True),
                        prefetch=read_part(sub, PART_READERS))


def _merge(a, b):
    """Merge two part results (cell statistics, a dense factor after a fallback, or absorbed-key
    statistics); cells beyond MAX_CELLS continue as the dense design's factor."""
    if isinstance(a, CellAccumulator) and isinstance(b, CellAccumulator):
        a = a.merge(b)
        return a.to_factor() if a.n_cells > MAX_CELLS else a
    if isinstance(a, (CellAccumulator, FactorAccumulator)):
        fa = a.to_factor() if isinstance(a, CellAccumulator) else a
        fb = b.to_factor() if isinstance(b, CellAccumulator) else b
        return fa.merge(fb)
    return a.merge(b)


def _stream_pass(source, spec: ModelSpec, batch_rows: int, progress, design: Design, prefetch: int = 2):
    """One stream: an AbsorbAccumulator, a CellAccumulator, or (after a fallback from too many
    cells) the dense design's FactorAccumulator."""
    from tallfit.engine.local import count_pruned, design_blocks, span_label

    z_names = design.names
    if spec.absorb:
        from tallfit.accumulate.absorb import AbsorbAccumulator

        acc = AbsorbAccumulator(spec.absorb, z_names, coders=design.coders, spec=spec)
        for block in design_blocks(source, spec, batch_rows, progress, extra_columns=[spec.absorb], design=design,
                                   prefetch=prefetch):
            acc.update_block(block, block.extra[spec.absorb],
                             span_label(source, block.file_index, block.row_start, block.n_read))
        count_pruned(source, acc.W)
        return acc
    cells = CellAccumulator(spec, design.coders, z_names)
    dense = None  # after a fallback: the dense design's factor
    for block in design_blocks(source, spec, batch_rows, progress, design=design, prefetch=prefetch):
        if dense is None:
            cells.update_block(block)
            if cells.n_cells > MAX_CELLS:  # too many combinations: continue with dense indicators
                dense = cells.to_factor()
            continue
        names_now = set(dense.names)
        have = [sum(indicator_name(c.column, lvl) in names_now for lvl in list(c.index)) for c in design.coders]
        D, names = _dense(block, design, have)
        dense.expand(names)
        if D.shape[0]:
            dense.R = fold_rows(dense.R, D)
        count_block(cells.W, block)
    count_pruned(source, cells.W)
    if dense is None:
        return cells
    return cells.to_factor_bookkeeping(dense)
