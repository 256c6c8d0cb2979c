"""Run a producer in a background thread, a bounded number of items ahead of the consumer.

Decoding (pyarrow) and factoring (LAPACK) both release the GIL, so reading batch k+1 while
batch k is folded uses both cores. The queue bound keeps memory at a few batches.
"""

from __future__ import annotations

import queue
import threading
from collections.abc import Callable, Iterable, Iterator, Sequence
from typing import TypeVar

T = TypeVar("T")
_DONE = object()


class _Failure:
    def __init__(self, exc: BaseException) -> None:
        self.exc = exc


def _put(q: queue.Queue, item, stop: threading.Event) -> bool:
    """Put an item, waiting while the queue is full; False once the consumer has stopped."""
    while not stop.is_set():
        try:
            q.put(item, timeout=0.1)
            return True
        except queue.Full:
            continue
    return False


def _drain(q: queue.Queue) -> Iterator:
    """The items of one producer's queue up to its end marker; a producer's failure is raised here."""
    while True:
        item = q.get()
        if item is _DONE:
            return
        if isinstance(item, _Failure):
            raise item.exc
        yield item


def prefetched(items: Iterable[T], depth: int = 2) -> Iterator[T]:
    """Yield the items of `items`, produced in a daemon thread at most `depth` ahead."""
    if depth <= 0:
        yield from items
        return
    q: queue.Queue = queue.Queue(maxsize=depth)
    stop = threading.Event()

    def put(item) -> bool:
        return _put(q, item, stop)

    def produce() -> None:
        try:
            for item in items:
                if not put(item):
                    return
        except BaseException as exc:  # handed to the consumer, re-raised there
            put(_Failure(exc))
            return
        put(_DONE)

    worker = threading.Thread(target=produce, name="tallfit-reader", daemon=True)
    worker.start()
    try:
        yield from _drain(q)
    finally:
        stop.set()
        worker.join(timeout=5)


def prefetched_in_order(producers: Sequence[Callable[[], Iterable[T]]], workers: int, depth: int = 2) -> Iterator[T]:
    """The items of every producer, producer after producer, made by `workers` threads at once.

    Thread w runs producers w, w + W, w + 2W, …; each producer has its own queue of at most
    `depth` items, so a thread works at most one producer ahead of the consumer and memory stays
    at about W·(depth + 1) items. The consumer sees exactly the order of a serial run.
    """
    n = len(producers)
    if n == 0:
        return
    if workers <= 1 or n == 1:
        for make in producers:
            yield from prefetched(make(), depth=depth)
        return
    queues = [queue.Queue(maxsize=max(1, depth)) for _ in range(n)]
    stop = threading.Event()

    def put(q: queue.Queue, item) -> bool:
        return _put(q, item, stop)

    def run(w: int) -> None:
        for i in range(w, n, workers):
            try:
                for item in producers[i]():
                    if not put(queues[i], item):
                        return
            except BaseException as exc:  # handed to the consumer when it reaches this producer
                put(queues[i], _Failure(exc))
                return
            if not put(queues[i], _DONE):
                return

    threads = [threading.Thread(target=run, args=(w,), name=f"tallfit-reader-{w}", daemon=True)
               for w in range(min(workers, n))]
    for t in threads:
        t.start()
    try:
        for q in queues:
            yield from _drain(q)
    finally:
        stop.set()
        for t in threads:
            t.join(timeout=5)
