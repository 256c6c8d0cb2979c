"""Robust and clustered errors for per-group models (``by``): one more pass, rows routed by group.

Each batch is split by group key (one stable sort, grouped.group_rows); each group's rows go
through that group's own design (its categorical coding) into that group's second-pass sums
(engine/pass_sums.py), so every group gets exactly the sandwich a pass over its rows alone would
give. Rows of groups without a model (too few rows, aliased) and of a missing key are skipped.
When the groups share one design (no categoricals) and one cluster key at most is asked, every
group's sandwich sums come from one sweep per block instead (kernels/group_sandwich.py: no call per group
and block). On a dask cluster each part's group sums are made by a worker and merged in part order.
Memory: O(groups × (terms² + clusters × terms)). Residual diagnostics of every group come from one
pass too (``grouped_second_pass``: each group's whole second pass, its bin grids from its own first
rows, a few hundred KB of histograms per group), or of one group by its own pass
(GroupedFit.group: that group's model with its rows as the filter).
"""

from __future__ import annotations

from collections.abc import Sequence

import pyarrow as pa

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
    source = _checked_source(grouped, data, cluster)
    plans = {k: PassPlan(m, cluster, (), False, 0, robust) for k, m in models.items()}
    by = list(grouped.by)
    run = current()
    parts = source_parts(source) if run is not None else None
    batched = _batched(spec, plans, cluster)
    if parts is not None and batched:  # each part's sums on a cluster worker, merged there in order
        sums = run.map_merge(batched_part, [sub for sub, _ in parts], lambda a, b: a.absorb(b), "chain",
                             progress=progress, places=parts, models=models, plans=plans, by=by, cluster=cluster,
                             batch_rows=batch_rows).results(plans)
    elif parts is not None:
        sums = run.map_merge(grouped_part, [sub for sub, _ in parts], _merge_group_sums, "chain", progress=progress,
                             places=parts, models=models, plans=plans, by=by, cluster=cluster, batch_rows=batch_rows)
        for key, part in sums.items():
            part.plan = plans[key]
    elif batched:
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


def _checked_source(grouped, data, extra: list[str]):
    """``data`` as a source holding the models' columns, the grouping columns and ``extra``."""
    source = as_source(data)
    where = source_label(source)
    check_design_columns(next(iter(grouped.groups.values())).spec, source.schema, where)
    for col in list(grouped.by) + list(extra):
        if col not in source.schema.names:
            raise ColumnNotFoundError(col, source.schema.names, where=where)
    return source


def _placed(block, rows, n_read: int):
    """``block`` with its rows' places among the batch's ``n_read`` rows read (``block.keep``, so
    the largest residuals are named by their row in the file): ``rows`` are the places of the
    batch rows the block was made from."""
    import numpy as np

    used = rows if block.keep is None else rows[np.flatnonzero(block.keep)]
    keep = np.zeros(n_read, dtype=bool)
    keep[used] = True
    block.keep = keep
    return block


def _routed(source, models: dict, plans: dict, by: list[str], cluster: list[str], batch_rows: int, progress=None,
            keep: Sequence[str] = (), place: bool = False, prefetch: int = 0):
    """(group key, design block of that group's rows) for every batch of ``source``: without
    categoricals every group has the same design (one block per batch, split by group); else each
    group's rows go through its own coding. ``keep``: pass-through columns the blocks also carry;
    ``place``: each block knows its rows' places in the batch (to name the largest rows).
    ``prefetch``: batches decoded (and, with one design, made into design blocks) that many ahead
    on a reader thread, while the caller's thread splits them by group and folds them (measured
    for every group's whole second pass, 5 groups over 10^7 rows: the reader thread, which also
    split the blocks, was the one that kept the other waiting)."""
    import numpy as np

    first = next(iter(models.values()))
    spec = first.spec
    extra = list(dict.fromkeys(list(cluster) + list(keep)))
    read = list(dict.fromkeys(spec.input_columns + by + extra))
    shared = None if spec.categorical else Design(spec, coding=first.coding)
    designs = {} if shared is not None else {
        k: Design(spec, coding=m.coding, level_codes=plans[k].level_codes) for k, m in models.items()}

    def decoded():
        for chunk in source.batches(read, batch_rows):
            label = chunk_label(source, chunk)
            whole = None
            if shared is not None:
                whole = shared.block(chunk.batch, label, extra_columns=list(dict.fromkeys(by + extra)))
                whole.file_index, whole.row_start = chunk.file_index, chunk.row_start
            if progress is not None:
                progress(chunk.batch.num_rows, chunk.file_index)
            yield chunk, label, whole

    for chunk, label, whole in (prefetched(decoded(), depth=prefetch) if prefetch else decoded()):
        batch = chunk.batch
        if whole is not None:
            places = None
            if place:
                places = np.flatnonzero(whole.keep) if whole.keep is not None else np.arange(whole.n_read)
            for key, idx in group_rows([whole.extra[c] for c in by]):
                if key in models:
                    sub = whole.subset(idx)
                    yield key, (sub if places is None else _placed(sub, places[idx], batch.num_rows))
        else:
            for key, idx in group_rows([batch.column(c) for c in by]):
                if key in designs:
                    block = designs[key].block(batch.take(pa.array(idx)), label, extra_columns=extra)
                    block.file_index, block.row_start = chunk.file_index, chunk.row_start
                    yield key, (_placed(block, idx, batch.num_rows) if place else block)


GRID_SAMPLE_BYTES = 128 << 20  # the rows all groups hold for their bin grids (grouped_second_pass)
MIN_GROUP_SAMPLE = 8192


def grouped_second_pass(grouped, data, *, cluster: Sequence[str] = (), keep: Sequence[str] = (),
                        robust: str | None = "HC3", batch_rows: int = DEFAULT_BATCH_ROWS,
                        progress: ProgressHook | None = None) -> dict:
    """Every group's whole second pass (robust sums and residual diagnostics, as
    engine.second_pass gives one model) from one pass over ``data``, rows routed by group; each
    group's bin grids come from its own first rows. Memory: a few hundred KB of histograms per
    group (callers cap the groups). Returns {group key: SecondPass}."""
    from tallfit.engine.second_pass import SAMPLE_ROWS, TOP_K, GridsFirst
    from tallfit.solve.robust import check_kind, cluster_keys

    check_kind(robust)
    cluster = cluster_keys(cluster)
    models = grouped.groups
    spec = next(iter(models.values())).spec
    if spec.absorb:
        raise DesignError("checking every group at once does not take an absorbed key yet: name one group with --group")
    source = _checked_source(grouped, data, cluster + list(keep))
    plans = {k: PassPlan(m, cluster, keep, True, TOP_K, robust) for k, m in models.items()}
    # every group holds its first rows until they set its grids: SAMPLE_ROWS shared among the
    # groups (MIN_GROUP_SAMPLE at least, and less again when the held rows would pass
    # GRID_SAMPLE_BYTES in all), so the rows held do not grow with the data; a group's grid is
    # then set from fewer rows than a pass over that group alone takes (the sums in each cell
    # stay exact; the cells' edges differ)
    width = 8 * (len(spec.numeric_columns) + 2)
    share = max(MIN_GROUP_SAMPLE, SAMPLE_ROWS // len(models))
    sample = min(share, max(MIN_GROUP_SAMPLE // 8, GRID_SAMPLE_BYTES // (width * len(models))))
    streams = {k: GridsFirst(plans[k], PartSums(plans[k], source), sample) for k in models}
    blocks = _routed(source, models, plans, list(grouped.by), cluster, batch_rows, progress, keep=keep, place=True,
                     prefetch=2)
    with single_blas_thread():
        for key, block in blocks:
            streams[key].add(block)
    return {k: s.end().finish() for k, s in streams.items()}


def _group_sums(source, models: dict, plans: dict, by: list[str], cluster: list[str], batch_rows: int,
                progress=None, prefetch: int = 2) -> dict:
    """Every group's second-pass sums over ``source`` (decoded ``prefetch`` batches ahead)."""
    sums = {k: PartSums(plans[k], source) for k in models}
    with single_blas_thread():
        for key, block in _routed(source, models, plans, by, cluster, batch_rows, progress, prefetch=prefetch):
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


class GroupSandwich:
    """Every group's sandwich sums (and, with a cluster key, each (group, cluster) pair's score
    sums, coded by one PairCoder), folded block by block by one sweep (kernels/group_sandwich.py);
    mergeable, so parts on a cluster each make their own (create / fold / absorb / results)."""

    def __init__(self, models: dict, plans: dict, by: list[str], cluster: Sequence[str]) -> None:
        import numpy as np

        self.slot = {k: i for i, k in enumerate(models)}
        G, P = len(self.slot), max(p.p for p in plans.values())
        self.G, self.P = G, P
        self.cols, self.widths = np.zeros((G, P), dtype=np.int64), np.zeros(G, dtype=np.int64)
        self.Rinv, self.beta = np.zeros((G, P, P)), np.zeros((G, P))
        for k, plan in plans.items():
            g, p = self.slot[k], plan.p
            self.cols[g, :p], self.widths[g] = plan.cols, p
            self.Rinv[g, :p, :p], self.beta[g, :p] = plan.R11_inv, plan.beta
        self.mode = SandwichSums.create(1, next(iter(plans.values())).robust).mode
        self.gram, self.score_sum = np.zeros((G, P, P)), np.zeros((G, P))
        self.rss, self.rows, self.max_h = np.zeros(G), np.zeros(G, dtype=np.int64), np.zeros(G)
        self.n_read, self.dropped = 0, {}
        self.by, self.cluster = list(by), list(cluster)
        self.key_coder = KeyCoder(cluster[0]) if cluster else None
        self.pairs = PairCoder(cluster[0]) if cluster else None
        self.pair_sums = ClusterSums(cluster[0], P) if cluster else None

    def blocks(self, source, model, batch_rows: int, progress=None):
        """The design blocks of ``source`` (every group shares ``model``'s design)."""
        design = Design(model.spec, coding=model.coding)
        extra = list(dict.fromkeys(self.by + self.cluster))
        read = list(dict.fromkeys(model.spec.input_columns + extra))
        for chunk in source.batches(read, batch_rows):
            block = design.block(chunk.batch, chunk_label(source, chunk), extra_columns=extra)
            block.file_index, block.row_start = chunk.file_index, chunk.row_start
            if progress is not None:
                progress(chunk.batch.num_rows, chunk.file_index)
            yield block

    def fold(self, block, source) -> None:
        import numpy as np

        from tallfit.grouped import group_codes
        from tallfit.kernels.group_sandwich import group_sandwich

        self.n_read += block.n_read
        for name, count in block.dropped_by_column.items():
            self.dropped[name] = self.dropped.get(name, 0) + count
        if not block.n_used:
            return
        codes = group_codes([block.extra[c] for c in self.by], lambda key: self.slot.get(key, -1))
        used = codes >= 0
        scores = np.zeros((block.n_used if self.cluster else 0, self.P))
        group_sandwich(block.A, codes, self.cols, self.widths, self.Rinv, self.beta, self.mode, self.gram,
                       self.score_sum, self.rss, self.rows, self.max_h, scores)
        if self.cluster:  # each row's scores to its (group, cluster) pair
            where = span_label(source, block.file_index, block.row_start, block.n_read)
            keys_here = self.key_coder.encode(block.extra[self.cluster[0]].filter(pa.array(used)), where)
            ids = self.pairs.encode(codes[used], keys_here)
            self.pair_sums.update(ids, scores[used], self.pairs.groups)

    def absorb(self, other: "GroupSandwich") -> "GroupSandwich":
        """Add the sums of the part that follows this one in the data."""
        import numpy as np

        for name in ("gram", "score_sum", "rss", "rows"):
            getattr(self, name)[...] += getattr(other, name)
        np.maximum(self.max_h, other.max_h, out=self.max_h)
        self.n_read += other.n_read
        for name, count in other.dropped.items():
            self.dropped[name] = self.dropped.get(name, 0) + count
        if self.cluster:
            keys = self.key_coder.absorb(other.key_coder)
            lut = self.pairs.absorb(other.pairs, np.arange(self.G, dtype=np.int64), keys)
            self.pair_sums.absorb(other.pair_sums, lut, self.pairs.groups)
        return self

    def results(self, plans: dict) -> dict:
        """SecondPass values per group with what robust_for_model reads."""
        import numpy as np

        from tallfit.engine.pass_sums import SecondPass

        by_group = _pairs_by_group(self.pairs, self.pair_sums, self.G) if self.cluster else {}
        out = {}
        for k, plan in plans.items():
            g, p = self.slot[k], plan.p
            sums = SandwichSums(p, self.mode, int(self.rows[g]), self.gram[g, :p, :p].copy(),
                                self.score_sum[g, :p].copy(), float(self.rss[g]), float(self.max_h[g]))
            clusters = []
            if self.cluster:
                S = np.asfortranarray(by_group.get(g, np.zeros((0, self.P)))[:, :p])
                clusters = [ClusterSums(self.cluster[0], p, S=S, groups=S.shape[0])]
            out[k] = SecondPass(terms=list(plan.terms), features=list(plan.features), n_read=self.n_read,
                                n_used=int(self.rows[g]), dropped_by_column=dict(self.dropped), sandwich=sums,
                                clusters=clusters)
        return out


def _sandwich_sums(source, models: dict, plans: dict, by: list[str], cluster: Sequence[str], batch_rows: int,
                   progress=None, prefetch: int = 2) -> GroupSandwich:
    """Every group's sums over ``source`` from one sweep per block (decoded ``prefetch`` batches ahead)."""
    sums = GroupSandwich(models, plans, by, cluster)
    blocks = sums.blocks(source, next(iter(models.values())), batch_rows, progress)
    for block in (prefetched(blocks, depth=prefetch) if prefetch else blocks):
        sums.fold(block, source)
    return sums


def _batched_sums(source, models: dict, plans: dict, by: list[str], batch_rows: int, progress=None,
                  cluster: Sequence[str] = ()) -> dict:
    """Every group's sums from one sweep per block (GroupSandwich), as SecondPass values."""
    return _sandwich_sums(source, models, plans, by, cluster, batch_rows, progress).results(plans)


def batched_part(sub, models: dict, plans: dict, by: list[str], cluster: list[str], batch_rows: int) -> GroupSandwich:
    """One part's GroupSandwich, read by a cluster worker."""
    from tallfit.engine.cluster import PART_READERS
    from tallfit.engine.parallel import read_part

    read_part(sub, PART_READERS)
    return _sandwich_sums(sub, models, plans, by, cluster, batch_rows, prefetch=0)


def _pairs_by_group(pairs, pair_sums, G: int) -> dict:
    """Each group's rows of the pair sums (its clusters, in order of first appearance)."""
    import numpy as np

    n = pairs.groups
    group_of = pairs.table.keys[:n] >> 32
    order = np.argsort(group_of, kind="stable")
    bounds = np.searchsorted(group_of[order], np.arange(G + 1))
    S = pair_sums.S[:n]
    return {g: S[order[bounds[g]:bounds[g + 1]]] for g in range(G) if bounds[g + 1] > bounds[g]}
