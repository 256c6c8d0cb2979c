"""Run a producer in a background thread, a bounded number of items ahead of the consumer.

Decoding (pyarrow) and factoring (LAPACK) both release the GIL, so reading batch k+1 while
batch k is folded uses both cores. The queue bound keeps memory at a few batches.
"""

from __future__ import annotations

import queue
import threading
from collections.abc import Iterable, Iterator
from typing import TypeVar

T = TypeVar("T")
_DONE = object()


class _Failure:
    def __init__(self, exc: BaseException) -> None:
        self.exc = exc


def prefetched(items: Iterable[T], depth: int = 2) -> Iterator[T]:
    """Yield the items of `items`, produced in a daemon thread at most `depth` ahead."""
    if depth <= 0:
        yield from items
        return
    q: queue.Queue = queue.Queue(maxsize=depth)
    stop = threading.Event()

    def put(item) -> bool:
        while not stop.is_set():
            try:
                q.put(item, timeout=0.1)
                return True
            except queue.Full:
                continue
        return False

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
        while True:
            item = q.get()
            if item is _DONE:
                return
            if isinstance(item, _Failure):
                raise item.exc
            yield item
    finally:
        stop.set()
        worker.join(timeout=5)
