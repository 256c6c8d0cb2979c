"""Robust and clustered errors for per-group models (``by``): one more pass, rows routed by group.

Each batch is split by group key (one stable sort, grouped.group_rows); each group's rows go
through that group's own design (its categorical coding) into that group's second-pass sums
(engine/pass_sums.py), so every group gets exactly the sandwich a pass over its rows alone would
give. Rows of groups without a model (too few rows, aliased) and of a missing key are skipped.
Memory: O(groups × (terms² + clusters × terms)). Residual diagnostics check one group at a time
(GroupedFit.group: that group's model with its rows as the filter).
"""

from __future__ import annotations

from collections.abc import Sequence

import pyarrow as pa

from tallfit.design.design import Design, check_design_columns
from tallfit.engine.cluster import current
from tallfit.engine.local import DEFAULT_BATCH_ROWS, ProgressHook, chunk_label
from tallfit.engine.parallel import source_parts
from tallfit.engine.pass_sums import PartSums, PassPlan
from tallfit.engine.prefetch import prefetched
from tallfit.errors import ColumnNotFoundError, DesignError
from tallfit.grouped import group_rows
from tallfit.inputs import as_source, source_label
from tallfit.kernels.lapack_calls import single_blas_thread


def grouped_robust(grouped, data, *, robust: str | None, cluster: Sequence[str] = (),
                   batch_rows: int = DEFAULT_BATCH_ROWS, progress: ProgressHook | None = None) -> None:
    """Set ``robust`` on every group's model from one pass over ``data`` (its fitting data)."""
    from tallfit.solve.robust import check_kind, cluster_keys, robust_for_model

    check_kind(robust)
    cluster = cluster_keys(cluster)
    models = grouped.groups
    first = next(iter(models.values()))
    spec = first.spec
    source = as_source(data)
    where = source_label(source)
    check_design_columns(spec, source.schema, where)
    for col in list(grouped.by) + cluster:
        if col not in source.schema.names:
            raise ColumnNotFoundError(col, source.schema.names, where=where)
    plans = {k: PassPlan(m, cluster, (), False, 0, robust) for k, m in models.items()}
    by = list(grouped.by)
    run = current()
    parts = source_parts(source) if run is not None else None
    if parts is not None:  # each part's group sums on a cluster worker, merged there part after part
        sums = run.map_merge(grouped_part, [sub for sub, _ in parts], _merge_group_sums, "chain", progress=progress,
                             places=parts, models=models, plans=plans, by=by, cluster=cluster, batch_rows=batch_rows)
        for key, part in sums.items():
            part.plan = plans[key]
    else:
        sums = _group_sums(source, models, plans, by, cluster, batch_rows, progress)
    for key, model in models.items():
        sp = sums[key].finish()
        try:
            model.robust = robust_for_model(model, sp.sandwich, sp.clusters, robust)
        except DesignError as exc:  # one group's problem (too few clusters, say) is that group's
            model.robust = None
            model.warnings.append(f"no robust errors for this group: {exc}")


def _routed(source, models: dict, plans: dict, by: list[str], cluster: list[str], batch_rows: int, progress=None):
    """(group key, design block of that group's rows) for every batch of ``source``: without
    categoricals every group has the same design (one block per batch, split by group); else each
    group's rows go through its own coding."""
    first = next(iter(models.values()))
    spec = first.spec
    read = list(dict.fromkeys(spec.input_columns + by + cluster))
    shared = None if spec.categorical else Design(spec, coding=first.coding)
    designs = {} if shared is not None else {
        k: Design(spec, coding=m.coding, level_codes=plans[k].level_codes) for k, m in models.items()}
    for chunk in source.batches(read, batch_rows):
        batch = chunk.batch
        label = chunk_label(source, chunk)
        if shared is not None:
            whole = shared.block(batch, label, extra_columns=list(dict.fromkeys(by + cluster)))
            whole.file_index, whole.row_start = chunk.file_index, chunk.row_start
            for key, idx in group_rows([whole.extra[c] for c in by]):
                if key in models:
                    yield key, whole.subset(idx)
        else:
            for key, idx in group_rows([batch.column(c) for c in by]):
                if key in designs:
                    block = designs[key].block(batch.take(pa.array(idx)), label, extra_columns=cluster)
                    block.file_index, block.row_start = chunk.file_index, chunk.row_start
                    yield key, block
        if progress is not None:
            progress(batch.num_rows, chunk.file_index)


def _group_sums(source, models: dict, plans: dict, by: list[str], cluster: list[str], batch_rows: int,
                progress=None, prefetch: int = 2) -> dict:
    """Every group's second-pass sums over ``source`` (decoded ``prefetch`` batches ahead)."""
    sums = {k: PartSums(plans[k], source) for k in models}
    blocks = _routed(source, models, plans, by, cluster, batch_rows, progress)
    with single_blas_thread():
        for key, block in (prefetched(blocks, depth=prefetch) if prefetch else blocks):
            sums[key].fold(block)
    return sums


def grouped_part(sub, models: dict, plans: dict, by: list[str], cluster: list[str], batch_rows: int) -> dict:
    """One part's group sums, read by a cluster worker; returned without their plans."""
    from tallfit.engine.cluster import PART_READERS
    from tallfit.engine.parallel import read_part

    read_part(sub, PART_READERS)
    sums = _group_sums(sub, models, plans, by, cluster, batch_rows, prefetch=0)
    for part in sums.values():
        part.release()
        part.plan = part.source = part.pool = None
    return sums


def _merge_group_sums(a: dict, b: dict) -> dict:
    """The group sums of two parts, the second's rows after the first's."""
    return {key: a[key].absorb(b[key]) for key in a}
