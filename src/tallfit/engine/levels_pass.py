"""The factor pass for designs with categorical columns or an absorbed key, exploiting the one-hot
structure: blocks carry only [features | y] and level codes (Design(structured=True)); cells of
the categorical columns (accumulate/onehot.py) or the absorbed key's levels (accumulate/absorb.py)
keep per-level statistics, and the factor of the dense indicator design is formed after the pass.
One stream, decoded one thread ahead of the thread that accumulates.
"""

from __future__ import annotations

import numpy as np

from tallfit.accumulate.onehot import MAX_CELLS, MAX_COLUMNS, CellAccumulator, count_block
from tallfit.design.design import Design
from tallfit.design.spec import ModelSpec, indicator_name
from tallfit.kernels.tsqr import fold_rows


def structured_applies(spec: ModelSpec) -> bool:
    """Whether the pass can keep level statistics instead of dense indicator columns."""
    if spec.by:
        return False
    return bool(spec.absorb) or 0 < len(spec.categorical) <= MAX_COLUMNS


def _dense(block, design: Design, at_least: list[int]) -> tuple[np.ndarray, list[str]]:
    """The dense design rows [1 | X | D | y]·√w of a structured block (after a fallback) and
    their names, with the levels known when the block was made (the reader runs ahead), but at
    least ``at_least`` levels per column (those the factor already has)."""
    from tallfit.design.spec import indicator_name

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


def structured_pass(source, spec: ModelSpec, batch_rows: int, progress, design: Design | None = None):
    """One pass; returns an AbsorbAccumulator (absorbed key) or a FactorAccumulator (the dense
    indicator design's factor, levels discovered while streaming)."""
    from tallfit.engine.local import count_pruned, design_blocks, span_label

    design = design or Design(spec, structured=True)
    z_names = design.names
    if spec.absorb:
        from tallfit.accumulate.absorb import AbsorbAccumulator

        acc = AbsorbAccumulator(spec.absorb, z_names, coders=design.coders, spec=spec)
        for block in design_blocks(source, spec, batch_rows, progress, extra_columns=[spec.absorb], design=design):
            acc.update_block(block, block.extra[spec.absorb],
                             span_label(source, block.file_index, block.row_start, block.n_read))
        count_pruned(source, acc.W)
        return acc
    cells = CellAccumulator(spec, design.coders, z_names)
    dense = None  # after a fallback: the dense design's factor
    for block in design_blocks(source, spec, batch_rows, progress, design=design):
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
    if dense is None:
        acc = cells.to_factor()
    else:
        acc = cells.to_factor_bookkeeping(dense)
    count_pruned(source, acc)
    return acc
