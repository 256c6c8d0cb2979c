"""One pass that fills the per-fold and holdout factors; the ordinary fit is their merge.

Rows are numbered by their position in the scan (counting every row read, used or not), so a
split by position is the same whatever the batch size. Key columns are read in the same scan
through ``design_blocks(..., extra_columns=keys)``.
"""

from __future__ import annotations

import numpy as np

from tallfit.accumulate.folds import FoldAccumulators, FoldPlan
from tallfit.design.spec import ModelSpec
from tallfit.engine.local import DEFAULT_BATCH_ROWS, ProgressHook, design_blocks


def split_blocks(source, spec: ModelSpec, plan: FoldPlan, batch_rows: int = DEFAULT_BATCH_ROWS,
                 progress: ProgressHook | None = None, coding: dict | None = None, *, first_row: int = 0,
                 prefetch: int = 2):
    """Design blocks with each used row's holdout flag and fold id (``FoldPlan.assign``).

    With ``coding`` (a later pass) the columns are the fitted ones; a level the fit never saw
    (one only in the holdout) is coded as the reference level. ``first_row``: the scan position
    of the source's first row (a part of a larger data set).
    """
    position = int(first_row)
    unseen = "reference" if coding else "error"
    for block in design_blocks(source, spec, batch_rows, progress, extra_columns=plan.key_columns,
                               coding=coding, unseen=unseen, prefetch=prefetch):
        if block.keep is None:
            rows = np.arange(position, position + block.n_used, dtype=np.int64)
        else:
            rows = position + np.flatnonzero(block.keep)
        position += block.n_read
        holdout, folds = plan.assign(block.extra, rows)
        yield block, holdout, folds


def accumulate_split(
    source,
    spec: ModelSpec,
    plan: FoldPlan,
    batch_rows: int = DEFAULT_BATCH_ROWS,
    progress: ProgressHook | None = None,
) -> FoldAccumulators:
    """One pass: a factor per fold (one when no folds) and one for the holdout rows.

    A plain design over a data set of several parts (files, runs of Parquet row groups) is split
    on every core, each part into its own fold factors, merged in part order; rows keep their scan
    positions (from the Parquet footers), so the split is the one a serial pass makes."""
    parts = _positioned_parts(source, spec)
    if parts is not None:
        return _accumulate_split_parts(parts, spec, plan, batch_rows, progress)
    accs = FoldAccumulators.create(spec.term_names + [spec.target], plan)
    _fill(accs, split_blocks(source, spec, plan, batch_rows, progress), plan)
    return accs


def _fill(accs: FoldAccumulators, blocks, plan: FoldPlan) -> None:
    for block, holdout, folds in blocks:
        for key in plan.key_columns:
            accs.count_missing_keys(key, block.extra[key].null_count)
        accs.update_block(block, holdout, folds)


def _positioned_parts(source, spec: ModelSpec) -> list | None:
    """(part, scan position of its first row) for a plain design over Parquet parts, else None."""
    from tallfit.design.design import Design
    from tallfit.engine.parallel import source_parts

    if not Design(spec).plain or getattr(source, "format", None) != "parquet":
        return None
    parts = source_parts(source)
    if parts is None:
        return None
    file_rows = [sub.row_count() for sub, _ in parts]
    offsets, out, file_start, current = {}, [], 0, None
    for (sub, i), n in zip(parts, file_rows):
        if i != current:  # first part of file i: the file starts after all rows of earlier files
            offsets[i] = file_start
            current = i
        out.append((sub, i, offsets[i] + sub.first_row))
        file_start = offsets[i] + sub.first_row + n
    return out


def split_part(part: tuple, spec: ModelSpec, plan: FoldPlan, batch_rows: int) -> FoldAccumulators:
    """One part's fold factors, ``part`` = (part source, scan position of its first row), read by a
    cluster worker."""
    from tallfit.engine.cluster import PART_READERS
    from tallfit.engine.parallel import read_part

    sub, first_row = part
    accs = FoldAccumulators.create(spec.term_names + [spec.target], plan)
    _fill(accs, split_blocks(sub, spec, plan, batch_rows, None, first_row=first_row,
                             prefetch=read_part(sub, PART_READERS)), plan)
    return accs


def _accumulate_split_parts(parts, spec: ModelSpec, plan: FoldPlan, batch_rows: int, progress) -> FoldAccumulators:
    import threading

    from tallfit.engine.cluster import current
    from tallfit.engine.parallel import offset_progress, part_workers, read_part, run_tasks, tree_merge

    cluster = current()
    if cluster is not None:  # each part's folds on a cluster worker, merged there by the same tree
        return cluster.map_merge(split_part, [(sub, first) for sub, _, first in parts], lambda a, b: a.merge(b),
                                 "tree", progress=progress, places=[(sub, i) for sub, i, _ in parts], spec=spec,
                                 plan=plan, batch_rows=batch_rows)

    lock = threading.Lock()
    w = part_workers(None, len(spec.term_names) + 1)

    def task(sub, file_index: int, first_row: int):
        def run() -> FoldAccumulators:
            accs = FoldAccumulators.create(spec.term_names + [spec.target], plan)
            hook = offset_progress(progress, file_index, lock)
            _fill(accs, split_blocks(sub, spec, plan, batch_rows, hook, first_row=first_row,
                                     prefetch=read_part(sub, w)), plan)
            return accs
        return run

    results = run_tasks([task(*p) for p in parts], w)
    return tree_merge(results, lambda a, b: a.merge(b))


def finalize_split(accs: FoldAccumulators, spec: ModelSpec, reference=None, min_count=None,
                   max_levels=None, merges=None) -> tuple[FoldAccumulators, dict | None]:
    """Give every fold and the holdout the final layout and the categorical coding of the training rows.

    Folds may have met different categorical levels; each is aligned to the union of columns,
    then recoded with the one coding chosen from the training rows' level counts (the same map
    T for every factor, so a fold's fit and its held-out error use the same columns).
    """
    from dataclasses import replace

    from tallfit.design.coding import finalize_coding

    parts = accs.folds + ([accs.holdout] if accs.holdout is not None else [])
    names = list(dict.fromkeys(n for a in parts for n in a.names[:-1])) + [spec.target]
    parts = [a.aligned(names) for a in parts]
    train = accs.training()
    if not spec.categorical:
        coded = parts
        coding = None
    else:
        _, coding, _ = finalize_coding(train, spec, reference, min_count, max_levels, merges)
        coded = []
        for a in parts:  # the training counts fix the plan; each factor keeps its own counts
            own = a.level_counts
            recoded, _, _ = finalize_coding(replace(a, level_counts=train.level_counts), spec, reference,
                                         min_count, max_levels, merges)
            coded.append(replace(recoded, level_counts=own))
    k = len(accs.folds)
    return replace(accs, folds=coded[:k], holdout=coded[k] if accs.holdout is not None else None), coding


def absolute_error_pass(
    source,
    spec: ModelSpec,
    plan: FoldPlan,
    B: np.ndarray,
    batch_rows: int = DEFAULT_BATCH_ROWS,
    progress: ProgressHook | None = None,
    coding: dict | None = None,
) -> tuple[np.ndarray, int]:
    """A second pass: Σ |y − X b| over the holdout rows for each column b of B (p × m), and their count.

    MAE is not a function of the factor, hence this pass, run only when asked for.
    """
    B = np.asarray(B, dtype=np.float64)
    B = B.reshape(B.shape[0], -1)
    total, n = np.zeros(B.shape[1]), 0
    for block, holdout, _ in split_blocks(source, spec, plan, batch_rows, progress, coding):
        if holdout is None or not holdout.any():
            continue
        A = block.A[holdout]
        total += np.abs(A[:, -1:] - A[:, :-1] @ B).sum(axis=0)
        n += A.shape[0]
    return total, n
