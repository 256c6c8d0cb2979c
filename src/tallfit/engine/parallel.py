"""Parallel folding: several threads each fold their share of the blocks into their own
accumulator, and the accumulators are merged in a balanced tree.

Threads suffice because every heavy step releases the GIL: pyarrow's decoding, LAPACK's dtpqrt
(called through ctypes, kernels/lapack_calls.py) and BLAS's np.dot. Each folding thread asks
OpenBLAS for a single thread of its own, so the library's threads do not fight ours.

Two schedules:
- one stream (a single file, or any design that must be read in order): a reader thread decodes
  and designs blocks; block i goes to folder i mod W. The split depends only on W.
- a plain numeric design over several files or a Parquet file of several row groups: one task per
  part (a file, or a run of row groups of at least SPAN_ROWS rows), pulled by W workers that each
  read and fold, decoding on their own core; the per-part accumulators are merged in part order by
  the same tree, so the result does not depend on the number of workers at all, and only to
  rounding on file order.

Memory stays bounded: every queue is bounded and buffers are reused (``BufferPool``).
"""

from __future__ import annotations

import os
import queue
import threading
from collections.abc import Callable, Iterable, Sequence
from typing import Any, TypeVar

import numpy as np

from tallfit.kernels.lapack_calls import single_blas_thread

T = TypeVar("T")
_DONE = object()


def worker_count(workers: int | None) -> int:
    """Workers to use: the cores available to this process when not given."""
    if workers is None:
        try:
            return max(1, len(os.sched_getaffinity(0)))
        except AttributeError:  # pragma: no cover - not Linux
            return max(1, os.cpu_count() or 1)
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise ValueError(f"workers must be a positive integer, got {workers!r}")
    return workers


#: Designs narrower than this many columns are decode-bound: parts get one spare worker.
SPARE_WORKER_BELOW_K = 48


def part_workers(workers: int | None, k: int) -> int:
    """Workers for a pass over parts: the cores, plus one spare for narrow designs when the caller
    did not choose (while one worker holds the GIL for Python glue and copies, the spare decodes;
    wide designs are bound by their arithmetic, and a third block buffer would only cost memory)."""
    w = worker_count(workers)
    if workers is None and w > 1 and k < SPARE_WORKER_BELOW_K:
        w += 1
    return w


def tree_merge(items: Sequence[T], merge: Callable[[T, T], T]) -> T:
    """Merge neighbours pairwise, level by level: ((a b)(c d))(e ...), a fixed shape for a given count."""
    level = list(items)
    if not level:
        raise ValueError("nothing to merge")
    while len(level) > 1:
        nxt = [merge(level[i], level[i + 1]) for i in range(0, len(level) - 1, 2)]
        if len(level) % 2:
            nxt.append(level[-1])
        level = nxt
    return level[0]


class BufferPool:
    """Fortran-order float64 buffers handed out by shape and given back after use (thread-safe).

    With ``pad_rows`` each buffer is the top (m × k) of an (m + pad_rows) × k array: columns stay
    contiguous, but their starts are no longer a power of two apart (cache-set conflicts)."""

    def __init__(self, pad_rows: int = 0) -> None:
        self.pad_rows = max(0, int(pad_rows))
        self._free: dict[tuple[int, int], list[np.ndarray]] = {}
        self._owned: set[int] = set()
        self._lock = threading.Lock()

    def take(self, shape: tuple[int, int]) -> np.ndarray:
        with self._lock:
            free = self._free.get(shape)
            if free:
                return free.pop()
        m, k = shape
        buf = np.empty((m + self.pad_rows, k), dtype=np.float64, order="F")[:m] if self.pad_rows else \
            np.empty(shape, dtype=np.float64, order="F")
        with self._lock:
            self._owned.add(id(buf))
        return buf

    def give(self, arr: np.ndarray) -> None:
        """Return a buffer from ``take``; anything else is ignored."""
        with self._lock:
            if id(arr) in self._owned:
                self._free.setdefault(arr.shape, []).append(arr)


class _Stop(Exception):
    pass


def _put(q: queue.Queue, item: Any, stop: threading.Event) -> None:
    while True:
        if stop.is_set():
            raise _Stop
        try:
            q.put(item, timeout=0.1)
            return
        except queue.Full:
            continue


def fold_round_robin(blocks: Iterable, workers: int, make: Callable[[], T],
                     fold: Callable[[T, Any], None]) -> list[T]:
    """Fold block i into accumulator i mod W, W threads in parallel; returns the W accumulators."""
    accs = [make() for _ in range(workers)]
    if workers == 1:
        with single_blas_thread():
            for block in blocks:
                fold(accs[0], block)
        return accs
    queues = [queue.Queue(maxsize=1) for _ in range(workers)]
    stop = threading.Event()
    failures: list[BaseException] = []

    def run(w: int) -> None:
        try:
            with single_blas_thread():
                while not stop.is_set():
                    try:
                        item = queues[w].get(timeout=0.1)
                    except queue.Empty:
                        continue
                    if item is _DONE:
                        return
                    fold(accs[w], item)
        except BaseException as exc:  # handed to the caller
            failures.append(exc)
            stop.set()

    threads = [threading.Thread(target=run, args=(w,), name=f"tallfit-fold-{w}", daemon=True)
               for w in range(workers)]
    for t in threads:
        t.start()
    try:
        for i, block in enumerate(blocks):
            _put(queues[i % workers], block, stop)
    except _Stop:
        pass
    except BaseException:
        stop.set()
        raise
    finally:
        for q in queues:
            try:
                _put(q, _DONE, stop)
            except _Stop:
                pass
        for t in threads:
            t.join()
        if hasattr(blocks, "close"):
            blocks.close()
    if failures:
        raise failures[0]
    return accs


def run_tasks(tasks: Sequence[Callable[[], T]], workers: int) -> list[T]:
    """Run independent tasks on W threads (each with one BLAS thread); results in task order."""
    results: list[Any] = [None] * len(tasks)
    if workers == 1 or len(tasks) == 1:
        with single_blas_thread():
            for i, task in enumerate(tasks):
                results[i] = task()
        return results
    lock = threading.Lock()
    nxt = [0]
    failures: list[BaseException] = []

    def run() -> None:
        with single_blas_thread():
            while True:
                with lock:
                    if failures or nxt[0] >= len(tasks):
                        return
                    i = nxt[0]
                    nxt[0] += 1
                try:
                    results[i] = tasks[i]()
                except BaseException as exc:  # handed to the caller
                    with lock:
                        failures.append(exc)
                    return

    threads = [threading.Thread(target=run, name=f"tallfit-worker-{w}", daemon=True)
               for w in range(min(workers, len(tasks)))]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    if failures:
        raise failures[0]
    return results


#: Parquet files are split into runs of whole row groups of at least this many rows, so that one
#: big file still gives every worker its own share of the decoding.
SPAN_ROWS = 1 << 18


#: Blocks read ahead per part when one worker reads every part (several workers decode and fold
#: in turn, one per core, with nothing read ahead).
PART_PREFETCH = 2


def read_part(sub, workers: int) -> int:
    """Prepare a part for its worker: with several workers each decodes on its own core (no
    decoding threads of the reader's own). Returns the read-ahead to give ``design_blocks``."""
    sub.decode_threads = workers == 1
    return PART_PREFETCH if workers == 1 else 0


class OrderedMerge:
    """Merges per-part results handed in by part index, in part order (acc = merge(acc, next)), as
    soon as the next one is there; results ahead of their turn wait. One merge at a time, so a
    worker handing in a result is not held up by another's merge. Thread-safe."""

    def __init__(self, merge: Callable[[Any, Any], Any]) -> None:
        self.merge = merge
        self.acc: Any = None
        self.next = 0
        self.waiting: dict[int, Any] = {}
        self._lock = threading.Lock()
        self._merging = threading.Lock()

    def put(self, index: int, item: Any) -> None:
        with self._lock:
            self.waiting[index] = item
        with self._merging:
            while True:
                with self._lock:
                    item = self.waiting.pop(self.next, None)
                    if item is None:
                        return
                    self.next += 1
                self.acc = item if self.acc is None else self.merge(self.acc, item)

    def result(self) -> Any:
        if self.waiting or self.acc is None:
            raise RuntimeError("a part's result is missing")  # pragma: no cover - run_tasks raised first
        return self.acc


def source_parts(source, span_rows: int | None = None) -> list | None:
    """(part, file index) pairs of a Source that has at least two parts (files or row-group runs), else None."""
    from tallfit.sources.base import Source

    if type(source) is not Source:
        return None
    parts = source.parts(SPAN_ROWS if span_rows is None else span_rows)
    return parts if len(parts) >= 2 else None


def offset_progress(progress, offset: int, lock: threading.Lock):
    """A progress hook for file `offset` of the whole data set, safe to call from several threads."""
    if progress is None:
        return None

    def hook(rows: int, file_index: int) -> None:
        with lock:
            progress(rows, offset + file_index)

    return hook
