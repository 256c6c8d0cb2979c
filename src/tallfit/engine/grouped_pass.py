"""Robust and clustered errors for per-group models (``by``): one more pass, rows routed by group.

Each batch is split by group key (one stable sort, grouped.group_rows); each group's rows go
through that group's own design (its categorical coding) into that group's second-pass sums
(engine/pass_sums.py), so every group gets exactly the sandwich a pass over its rows alone would
give. Rows of groups without a model (too few rows, aliased) and of a missing key are skipped.
When the groups share one design (no categoricals) and one cluster key at most is asked, every
group's sandwich sums come from one sweep per block instead (kernels/group_sandwich.py: no call per group
and block). On a dask cluster each part's group sums are made by a worker and merged in part order.
Memory: O(groups × (terms² + clusters × terms)). Residual diagnostics check one group at a time
(GroupedFit.group: that group's model with its rows as the filter).
"""

from __future__ import annotations

from collections.abc import Sequence

import pyarrow as pa
import pyarrow.compute as pc

from tallfit.design.design import Design, check_design_columns
from tallfit.engine.cluster import current
from tallfit.engine.cluster_codes import KeyCoder, PairCoder
from tallfit.engine.local import DEFAULT_BATCH_ROWS, ProgressHook, chunk_label, span_label
from tallfit.engine.parallel import source_parts
from tallfit.engine.pass_sums import PartSums, PassPlan
from tallfit.engine.prefetch import prefetched
from tallfit.errors import ColumnNotFoundError, DesignError
from tallfit.grouped import group_rows
from tallfit.inputs import as_source, source_label
from tallfit.kernels.lapack_calls import single_blas_thread
from tallfit.solve.robust import ClusterSums, SandwichSums


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
    elif _batched(spec, plans, cluster):
        sums = _batched_sums(source, models, plans, by, batch_rows, progress, cluster)
    else:
        sums = _group_sums(source, models, plans, by, cluster, batch_rows, progress)
    for key, model in models.items():
        sp = sums[key].finish() if isinstance(sums[key], PartSums) else sums[key]
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


def _batched(spec, plans: dict, cluster: list[str]) -> bool:
    """Whether the groups' sums can come from one sweep per block (kernels/group_sandwich.py):
    one shared design (no categoricals), one HC estimator, one cluster key at most, no frequency
    weights."""
    from tallfit.diagnostics.kernels import SCORES_ALL

    first = next(iter(plans.values()))
    return (not spec.categorical and len(cluster) <= 1 and not first.frequency and first.absorbed is None
            and SandwichSums.create(1, first.robust).mode != SCORES_ALL)


def _batched_sums(source, models: dict, plans: dict, by: list[str], batch_rows: int, progress=None,
                  cluster: list[str] = ()) -> dict:
    """Every group's sandwich sums from one sweep per block (and, with a cluster key, each
    (group, cluster) pair's score sums, coded by one PairCoder); returned as SecondPass values
    with what robust_for_model reads."""
    import numpy as np

    from tallfit.engine.pass_sums import SecondPass
    from tallfit.grouped import group_keys
    from tallfit.kernels.group_sandwich import group_sandwich

    keys = list(models)
    slot = {k: i for i, k in enumerate(keys)}
    G, P = len(keys), max(p.p for p in plans.values())
    cols, widths = np.zeros((G, P), dtype=np.int64), np.zeros(G, dtype=np.int64)
    Rinv, beta = np.zeros((G, P, P)), np.zeros((G, P))
    for k, plan in plans.items():
        g, p = slot[k], plan.p
        cols[g, :p], widths[g] = plan.cols, p
        Rinv[g, :p, :p], beta[g, :p] = plan.R11_inv, plan.beta
    mode = SandwichSums.create(1, next(iter(plans.values())).robust).mode
    gram, score_sum = np.zeros((G, P, P)), np.zeros((G, P))
    rss, rows, max_h = np.zeros(G), np.zeros(G, dtype=np.int64), np.zeros(G)
    n_read, n_used, dropped = 0, 0, {}
    first = next(iter(models.values()))
    design = Design(first.spec, coding=first.coding)
    read = list(dict.fromkeys(first.spec.input_columns + by + list(cluster)))
    key_coder = KeyCoder(cluster[0]) if cluster else None
    pairs, pair_sums = (PairCoder(cluster[0]), ClusterSums(cluster[0], P)) if cluster else (None, None)

    def blocks():
        for chunk in source.batches(read, batch_rows):
            block = design.block(chunk.batch, chunk_label(source, chunk), extra_columns=list(dict.fromkeys(by + list(cluster))))
            block.file_index, block.row_start = chunk.file_index, chunk.row_start
            if progress is not None:
                progress(chunk.batch.num_rows, chunk.file_index)
            yield block

    for block in prefetched(blocks(), depth=2):
        n_read += block.n_read
        for name, count in block.dropped_by_column.items():
            dropped[name] = dropped.get(name, 0) + count
        if not block.n_used:
            continue
        encoded = pc.dictionary_encode(group_keys([block.extra[c] for c in by]))
        if isinstance(encoded, pa.ChunkedArray):
            encoded = encoded.combine_chunks()
        slot_of = np.asarray([slot.get(k, -1) for k in encoded.dictionary.to_pylist()] + [-1], dtype=np.int64)
        codes = slot_of[encoded.indices.fill_null(len(encoded.dictionary)).to_numpy(zero_copy_only=False)
                        .astype(np.int64)]
        used = codes >= 0
        n_used += int(np.count_nonzero(used))
        scores = np.zeros((block.n_used if cluster else 0, P))
        group_sandwich(block.A, codes, cols, widths, Rinv, beta, mode, gram, score_sum, rss, rows, max_h, scores)
        if cluster:  # each row's scores to its (group, cluster) pair
            where = span_label(source, block.file_index, block.row_start, block.n_read)
            keys_here = key_coder.encode(block.extra[cluster[0]].filter(pa.array(used)), where)
            ids = pairs.encode(codes[used], keys_here)
            pair_sums.update(ids, scores[used], pairs.groups)
    by_group = _pairs_by_group(pairs, pair_sums, G) if cluster else {}
    out = {}
    for k, plan in plans.items():
        g, p = slot[k], plan.p
        sums = SandwichSums(p, mode, int(rows[g]), gram[g, :p, :p].copy(), score_sum[g, :p].copy(), float(rss[g]),
                            float(max_h[g]))
        clusters = []
        if cluster:
            S = np.asfortranarray(by_group.get(g, np.zeros((0, P)))[:, :p])
            clusters = [ClusterSums(cluster[0], p, S=S, groups=S.shape[0])]
        out[k] = SecondPass(terms=list(plan.terms), features=list(plan.features), n_read=n_read, n_used=int(rows[g]),
                            dropped_by_column=dict(dropped), sandwich=sums, clusters=clusters)
    return out


def _pairs_by_group(pairs, pair_sums, G: int) -> dict:
    """Each group's rows of the pair sums (its clusters, in order of first appearance)."""
    import numpy as np

    n = pairs.groups
    group_of = pairs.table.keys[:n] >> 32
    order = np.argsort(group_of, kind="stable")
    bounds = np.searchsorted(group_of[order], np.arange(G + 1))
    S = pair_sums.S[:n]
    return {g: S[order[bounds[g]:bounds[g + 1]]] for g in range(G) if bounds[g + 1] > bounds[g]}
