"""The second pass: one bounded-memory scan with the fitted model, for everything residuals give.

It gives the HC0–HC3 sandwich sums, cluster score sums for one key or two, Breusch–Pagan sums,
binned residuals per feature and per fitted value, a fitted × residual histogram, the residual
sketch and the rows with the largest residuals and leverages (engine/pass_sums.py: what is summed
per block and how parts merge; this module: the scan and its schedule).

Parallel: a data set of several parts (files, runs of Parquet row groups) is scanned part by part
on every core, each part into its own sums, merged in part order by a fixed-shape tree, so the
result does not depend on the number of workers. The bin grids are set from the first rows of the
data (up to ``SAMPLE_ROWS``, read before the parts start and then folded by their own part), so
every part bins on the same grid and the grids are those of a single ordered scan.

Memory: a few batches per worker, plus O(clusters × terms) for cluster sums and fixed-size
histograms per part being merged (at most about log₂(parts) + workers at a time).
"""

from __future__ import annotations

import threading
from collections.abc import Sequence
from typing import Any

from tallfit.engine.local import DEFAULT_BATCH_ROWS, ProgressHook, design_blocks
from tallfit.engine.parallel import BufferPool, offset_progress, run_tasks, source_parts, worker_count
from tallfit.engine.pass_sums import HEAT_CELLS, PartSums, PassPlan, SecondPass
from tallfit.errors import DesignError
from tallfit.kernels.lapack_calls import single_blas_thread
from tallfit.results import FitResult

__all__ = ["HEAT_CELLS", "SAMPLE_ROWS", "SecondPass", "TOP_K", "second_pass"]

SAMPLE_ROWS = 131_072
TOP_K = 10


class _OrderedMerge:
    """Merges per-part results in part order as they complete, by a binary-counter tree whose
    shape depends only on the number of parts; holds about log₂(parts) + workers results."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._done: dict[int, PartSums] = {}
        self._next = 0
        self._stack: list[tuple[int, PartSums]] = []

    def put(self, i: int, part: PartSums) -> None:
        part.release()
        with self._lock:
            self._done[i] = part
            while self._next in self._done:
                item = (1, self._done.pop(self._next))
                self._next += 1
                while self._stack and self._stack[-1][0] == item[0]:
                    size, left = self._stack.pop()
                    item = (size + item[0], left.absorb(item[1]))
                self._stack.append(item)

    def result(self) -> PartSums:
        size, acc = self._stack.pop()
        while self._stack:
            _, left = self._stack.pop()
            acc = left.absorb(acc)
        return acc


def _scan(plan: PassPlan, source, blocks) -> PartSums:
    """One ordered stream into one set of sums; the grids come from its first rows."""
    part = PartSums(plan, source)
    held: list = []
    rows = 0
    for block in blocks:
        if plan.ready:
            part.fold(block)
            continue
        held.append(block)
        rows += block.n_used
        if rows >= SAMPLE_ROWS:
            plan.set_grids(held, whole=False)
            for b in held:
                part.fold(b)
            held = []
    if not plan.ready:
        plan.set_grids(held, whole=True)
    for b in held:
        part.fold(b)
    return part


def _scan_parts(plan: PassPlan, parts: list, spec, coding, extra: list[str], batch_rows: int,
                progress, workers: int | None) -> PartSums:
    """Every part on its own worker; sums merged in part order (see the module note)."""
    w = worker_count(workers)
    lock = threading.Lock()
    pool = BufferPool() if not extra else None

    def stream(i: int):
        sub, file_index = parts[i]
        sub.decode_threads = w == 1  # several workers: each decodes on its own core
        return iter(design_blocks(sub, spec, batch_rows, offset_progress(progress, file_index, lock),
                                  extra_columns=extra, coding=coding, pool=pool, prefetch=2 if w == 1 else 0))

    started: dict[int, Any] = {}
    held: dict[int, list] = {}
    if not plan.ready:  # the sample: the first rows in data order, later folded by their own part
        sample, rows = [], 0
        for i in range(len(parts)):
            it = started[i] = stream(i)
            held[i] = []
            for block in it:
                held[i].append(block)
                sample.append(block)
                rows += block.n_used
                if rows >= SAMPLE_ROWS:
                    break
            if rows >= SAMPLE_ROWS:
                break
        plan.set_grids(sample, whole=rows < SAMPLE_ROWS)
    merged = _OrderedMerge()

    def task(i: int):
        def run() -> None:
            part = PartSums(plan, parts[i][0], pool)
            for block in held.pop(i, []):
                part.fold(block)
            for block in started.pop(i, None) or stream(i):
                part.fold(block)
            merged.put(i, part)
        return run

    run_tasks([task(i) for i in range(len(parts))], w)
    return merged.result()


def second_pass(
    model: FitResult,
    data,
    *,
    cluster: Sequence[str] = (),
    keep: Sequence[str] = (),
    diagnostics: bool = True,
    top_k: int = TOP_K,
    batch_rows: int = DEFAULT_BATCH_ROWS,
    progress: ProgressHook | None = None,
    workers: int | None = None,
) -> SecondPass:
    """Scan ``data`` once with the fitted ``model`` (see the module note); ``workers`` threads
    (default: every core) when the data has several parts. The result does not depend on it."""
    from tallfit.inputs import as_source

    if not isinstance(model, FitResult):
        raise DesignError(
            "the second pass checks one model at a time; per-group models are not supported yet "
            "(fit the group of interest with --where instead of --by)"
        )
    if model.spec.absorb:
        raise DesignError(
            f"robust errors and residual checks are not available for a model with an absorbed key "
            f"({model.spec.absorb!r}) yet: its residuals need the level effects; fit without --absorb "
            "to check the model"
        )
    cluster = list(dict.fromkeys(cluster))
    if len(cluster) > 2:
        raise DesignError(f"clustering takes one or two key columns, not {len(cluster)} ({', '.join(cluster)})")
    workers = worker_count(workers)
    source = as_source(data)
    plan = PassPlan(model, cluster, keep, diagnostics, top_k)
    extra = list(dict.fromkeys(list(cluster) + list(keep)))
    parts = source_parts(source)
    if parts is not None:
        return _scan_parts(plan, parts, model.spec, model.coding, extra, batch_rows, progress, workers).finish()
    blocks = design_blocks(source, model.spec, batch_rows, progress, extra_columns=extra, coding=model.coding)
    with single_blas_thread():  # OpenBLAS threads beside the reader were 4-150x slower here
        return _scan(plan, source, blocks).finish()
