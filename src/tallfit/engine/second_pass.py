"""The second pass: one bounded-memory scan with the fitted model, for everything residuals give.

It gives the sandwich sums of the chosen HC estimator (HC0–HC3, or all four), cluster score sums for one key or two, Breusch–Pagan sums,
binned residuals per feature and per fitted value, a fitted × residual histogram, the residual
sketch and the rows with the largest residuals and leverages (engine/pass_sums.py: what is summed
per block and how parts merge; this module: the scan and its schedule).

Parallel: a data set of several parts (files, runs of Parquet row groups) is scanned part by part
on every core, each part into its own sums, merged in part order (engine.parallel.OrderedMerge), so
the result does not depend on the number of workers. The bin grids are set from the first rows of the
data (up to ``SAMPLE_ROWS``: every part holds its first blocks until those rows are in, so the
decoding goes on on every core meanwhile; see ``_Sample``), so every part bins on the same grid and
the grids are those of a single ordered scan.

Memory: a few batches per worker, plus O(clusters × terms) for cluster sums and fixed-size
histograms per part alive (the running merge, one per worker, and parts done ahead of their turn).
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Sequence

from tallfit.design.categorical import shared_labels
from tallfit.engine.cluster import PART_READERS, current
from tallfit.engine.local import DEFAULT_BATCH_ROWS, ProgressHook, design_blocks
from tallfit.engine.parallel import (BufferPool, OrderedMerge, offset_progress, read_part, run_tasks, source_parts,
                                     worker_count)
from tallfit.engine.pass_sums import HEAT_CELLS, PartSums, PassPlan, SecondPass
from tallfit.errors import DesignError
from tallfit.kernels.lapack_calls import single_blas_thread
from tallfit.results import FitResult
from tallfit.solve.robust import check_kind, cluster_keys

__all__ = ["HEAT_CELLS", "SAMPLE_ROWS", "GridsFirst", "SecondPass", "TOP_K", "second_pass"]

SAMPLE_ROWS = 131_072
TOP_K = 10


class GridsFirst:
    """One ordered stream's blocks folded into ``part``, its first blocks held until they set the
    plan's bin grids (``sample_rows`` used rows, or all of the stream's rows at its end)."""

    def __init__(self, plan: PassPlan, part: PartSums, sample_rows: int = SAMPLE_ROWS) -> None:
        self.plan, self.part, self.sample_rows = plan, part, sample_rows
        self.held: list = []
        self.rows = 0

    def add(self, block) -> None:
        if self.plan.ready:
            self.part.fold(block)
            return
        self.held.append(block)
        self.rows += block.n_used
        if self.rows >= self.sample_rows:
            self._set(whole=False)

    def _set(self, whole: bool) -> None:
        self.plan.set_grids(self.held, whole=whole)
        for b in self.held:
            self.part.fold(b)
        self.held = []

    def end(self) -> PartSums:
        if not self.plan.ready:
            self._set(whole=True)
        return self.part


def _scan(plan: PassPlan, source, blocks) -> PartSums:
    """One ordered stream into one set of sums; the grids come from its first rows."""
    stream = GridsFirst(plan, PartSums(plan, source))
    for block in blocks:
        stream.add(block)
    return stream.end()


class _Sample:
    """The grids' sample while the parts stream on every worker: each part holds its first blocks
    (until it holds SAMPLE_ROWS used rows, or ends) and waits; as soon as the held blocks in part
    order reach SAMPLE_ROWS (or every part has ended) the grids are set from exactly the rows one
    ordered scan would take. Decoding thus goes on on every core while the sample is gathered.

    A part that ends before then is parked; whoever sets the grids folds it (``on_parked``). No
    wait can deadlock: a waiting part holds SAMPLE_ROWS rows, so the sample is complete once every
    part before it has ended, and those parts (started before it) are running or parked."""

    def __init__(self, plan: PassPlan, n_parts: int) -> None:
        self.plan = plan
        self.held: list[list] = [[] for _ in range(n_parts)]
        self.rows = [0] * n_parts
        self.ended = [False] * n_parts
        self.parked: dict[int, PartSums] = {}
        self.aborted = False
        self.cond = threading.Condition()
        self.on_parked: Callable[[int, PartSums, list], None] = lambda i, part, held: None

    def hold_all(self, i: int, part: PartSums, blocks) -> bool:
        """Read part i's first blocks until the grids are set (True: fold ``take(i)``, then the
        rest of ``blocks``) or the part ends first (False: parked, or the pass was aborted)."""
        if self.plan.ready:
            return True
        todo: list = []
        while True:
            block = None if self.aborted else next(blocks, None)
            with self.cond:
                if self.aborted:
                    return False
                if block is None:
                    self.ended[i] = True
                else:
                    self.held[i].append(block)
                    self.rows[i] += block.n_used
                todo = self._try_set()
                if not self.plan.ready and block is None:
                    self.parked[i] = part
                    go_on = False
                    break
                if self.plan.ready or self.rows[i] >= SAMPLE_ROWS:
                    while not self.plan.ready and not self.aborted:
                        self.cond.wait()
                    go_on = not self.aborted
                    break
        for j, parked in todo:  # outside the lock: the folding of parts that ended early
            self.on_parked(j, parked, self.take(j))
        return go_on

    def _try_set(self) -> list[tuple[int, PartSums]]:
        """Set the grids if the held blocks decide the sample (under the lock); the parked parts
        for the caller to fold."""
        if self.plan.ready:
            return []
        sample, rows = [], 0
        for j, held in enumerate(self.held):
            for block in held:
                sample.append(block)
                rows += block.n_used
                if rows >= SAMPLE_ROWS:
                    return self._set(sample, whole=False)
            if not self.ended[j]:
                return []
        return self._set(sample, whole=True)

    def _set(self, sample: list, whole: bool) -> list[tuple[int, PartSums]]:
        self.plan.set_grids(sample, whole=whole)
        self.cond.notify_all()
        todo = sorted(self.parked.items())
        self.parked = {}
        return todo

    def take(self, i: int) -> list:
        with self.cond:
            held, self.held[i] = self.held[i], []
            return held

    def abort(self) -> None:
        with self.cond:
            self.aborted = True
            self.cond.notify_all()


def _scan_parts(plan: PassPlan, parts: list, spec, coding, extra: list[str], batch_rows: int,
                progress, workers: int | None) -> PartSums:
    """Every part on its own worker; sums merged in part order (see the module note)."""
    w = worker_count(workers)
    lock = threading.Lock()
    pool = BufferPool()

    def stream(i: int):
        sub, file_index = parts[i]
        return _part_blocks(plan, sub, spec, coding, extra, batch_rows, offset_progress(progress, file_index, lock),
                            pool=pool, prefetch=read_part(sub, w))

    merged = OrderedMerge(lambda a, b: a.absorb(b))
    sample = _Sample(plan, len(parts))

    def task(i: int):
        def run() -> None:
            part = PartSums(plan, parts[i][0], pool)
            blocks = stream(i)
            try:
                if not sample.hold_all(i, part, blocks):
                    return  # the part ended before the grids were set: their setter folds it
            except BaseException:
                sample.abort()
                raise
            for block in sample.take(i):
                part.fold(block)
            for block in blocks:
                part.fold(block)
            part.release()
            merged.put(i, part)
        return run

    def fold_parked(i: int, part: PartSums, held: list) -> None:
        for block in held:
            part.fold(block)
        part.release()
        merged.put(i, part)

    sample.on_parked = fold_parked
    with shared_labels():  # cluster keys of parts with one label dictionary: hashed once
        run_tasks([task(i) for i in range(len(parts))], w)
    return merged.result()


def _part_blocks(plan: PassPlan, sub, spec, coding, extra: list[str], batch_rows: int, progress=None,
                 pool: BufferPool | None = None, prefetch: int = 0):
    """A part's design blocks for the pass (with each row's absorbed level, if any)."""
    blocks = design_blocks(sub, spec, batch_rows, progress, extra_columns=extra, coding=coding, pool=pool,
                           prefetch=prefetch, level_codes=plan.level_codes)
    return iter(plan.absorbed.coded(blocks, sub) if plan.absorbed is not None else blocks)


def part_sums(sub, plan: PassPlan, spec, coding, extra: list[str], batch_rows: int) -> PartSums:
    """One part's sums, read and folded by a cluster worker; returned without the plan (the
    caller holds it)."""
    pool = BufferPool()
    part = PartSums(plan, sub, pool)
    with single_blas_thread():
        for block in _part_blocks(plan, sub, spec, coding, extra, batch_rows, pool=pool,
                                  prefetch=read_part(sub, PART_READERS)):
            part.fold(block)
    part.release()
    part.plan = part.source = part.pool = None
    return part


def _scan_on_cluster(cluster, plan: PassPlan, parts: list, spec, coding, extra: list[str],
                     batch_rows: int, progress=None) -> PartSums:
    """The parts' sums on the cluster's workers, merged there in part order; the bin grids are set
    here first, from the first rows in data order (the rows a local pass would take)."""
    if not plan.ready:
        held, rows = [], 0
        for sub, _ in parts:
            for block in _part_blocks(plan, sub, spec, coding, extra, batch_rows):
                held.append(block)
                rows += block.n_used
                if rows >= SAMPLE_ROWS:
                    break
            if rows >= SAMPLE_ROWS:
                break
        plan.set_grids(held, whole=rows < SAMPLE_ROWS)
    merged = cluster.map_merge(part_sums, [sub for sub, _ in parts], lambda a, b: a.absorb(b), "chain",
                               progress=progress, places=parts, plan=plan, spec=spec, coding=coding, extra=extra,
                               batch_rows=batch_rows)
    merged.plan = plan
    return merged


def second_pass(
    model: FitResult,
    data,
    *,
    cluster: Sequence[str] = (),
    keep: Sequence[str] = (),
    robust: str | None = "HC3",
    diagnostics: bool = True,
    top_k: int = TOP_K,
    batch_rows: int = DEFAULT_BATCH_ROWS,
    progress: ProgressHook | None = None,
    workers: int | None = None,
) -> SecondPass:
    """Scan ``data`` once with the fitted ``model`` (see the module note); ``workers`` threads
    (default: every core) when the data has several parts. The result does not depend on it.
    ``robust`` names the HC estimator whose sandwich sums are kept ("all": the four, at about
    four times the cost of one)."""
    from tallfit.inputs import as_source

    if not isinstance(model, FitResult):
        raise DesignError(
            "the second pass checks one model at a time: name one group of the per-group models "
            "(--group, or GroupedFit.group(key, schema))"
        )
    absorbed = (model.coding or {}).get("absorbed") if model.spec.absorb else None
    if model.spec.absorb and (not absorbed or "means" not in absorbed):
        raise DesignError(
            f"robust errors and residual checks for a model with an absorbed key ({model.spec.absorb!r}) "
            "need its levels' means, which this model file lacks; fit it again with this version"
        )
    cluster = cluster_keys(cluster)
    workers = worker_count(workers)
    source = as_source(data)
    check_kind(robust)
    plan = PassPlan(model, cluster, keep, diagnostics, top_k, robust)
    extra = list(dict.fromkeys(list(cluster) + list(keep) + ([model.spec.absorb] if absorbed else [])))
    parts = source_parts(source)
    cluster = current()
    if parts is not None and cluster is not None:
        return _scan_on_cluster(cluster, plan, parts, model.spec, model.coding, extra, batch_rows, progress).finish()
    if parts is not None:
        return _scan_parts(plan, parts, model.spec, model.coding, extra, batch_rows, progress, workers).finish()
    blocks = design_blocks(source, model.spec, batch_rows, progress, extra_columns=extra, coding=model.coding,
                           level_codes=plan.level_codes)
    if plan.absorbed is not None:
        blocks = plan.absorbed.coded(blocks, source)
    with single_blas_thread():  # OpenBLAS threads beside the reader were 4-150x slower here
        return _scan(plan, source, blocks).finish()
