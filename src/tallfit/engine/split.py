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
                 progress: ProgressHook | None = None, coding: dict | None = None):
    """Design blocks with each used row's holdout flag and fold id (``FoldPlan.assign``).

    With ``coding`` (a later pass) the columns are the fitted ones; a level the fit never saw
    (one only in the holdout) is coded as the reference level.
    """
    position = 0
    unseen = "reference" if coding else "error"
    for block in design_blocks(source, spec, batch_rows, progress, extra_columns=plan.key_columns,
                               coding=coding, unseen=unseen):
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
    """One pass: a factor per fold (one when no folds) and one for the holdout rows."""
    accs = FoldAccumulators.create(spec.term_names + [spec.target], plan)
    for block, holdout, folds in split_blocks(source, spec, plan, batch_rows, progress):
        for key in plan.key_columns:
            accs.count_missing_keys(key, block.extra[key].null_count)
        accs.update_block(block, holdout, folds)
    return accs


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
