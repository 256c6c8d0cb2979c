"""Passes over parts on a dask.distributed cluster, for data too big for one machine's cores.

Inside ``on_cluster(scheduler)`` a pass over a data set of several parts (files, runs of Parquet
row groups: ``Source.parts``) sends each part to a cluster worker, which reads it itself and
folds it into the pass's accumulator; the per-part accumulators are then merged on the cluster
in the order and shape the local pass merges them (a balanced tree, or part after part), so the
answer is the local one, bit for bit. Only the part descriptions (file, row groups, the model
spec) go out and only accumulators (kilobytes, or O(levels × features) with an absorbed key)
come back. The workers must reach the files (a shared file system or object storage URIs) and
have tallfit installed. Data that is not files (a table in this process) or is one part is read
here, as without a cluster.

``scheduler``: a ``distributed.Client``, a scheduler address (``"tcp://host:8786"``), or
``"local"`` for a cluster of one worker process per core on this machine (to try the path).
"""

from __future__ import annotations

import contextlib
import contextvars
from collections.abc import Callable, Iterator, Sequence
from typing import Any

from tallfit.errors import DataSourceError, DesignError

CONNECT_SECONDS = 20  # how long to try to reach a scheduler
#: A part on a cluster worker is read as by one of several local workers (engine.parallel.read_part):
#: no decoding threads of its own and nothing read ahead, since the worker runs a task per core
#: (measured on a LocalCluster of 2 processes: the fit 1.30 → 1.10× the local threads).
PART_READERS = 2
_CURRENT: contextvars.ContextVar["ClusterRun | None"] = contextvars.ContextVar("tallfit_cluster", default=None)


class ClusterRun:
    """The client of one ``on_cluster`` block and what ran on it (parts, passes)."""

    def __init__(self, client, address: str) -> None:
        self.client = client
        self.address = address
        self.parts = 0
        self.passes = 0
        self.kept_here: str | None = None  # why a pass ran on this machine instead (for the result's note)

    def map_merge(self, fn: Callable, parts: Sequence, merge: Callable[[Any, Any], Any], shape: str,
                  progress=None, places: Sequence | None = None, **kwargs) -> Any:
        """``fn(part, **kwargs)`` for every part on the workers, merged there in part order:
        ``shape`` "tree" as engine.parallel.tree_merge, "chain" as OrderedMerge (a left fold).
        ``progress(rows, file_index)`` is told of each part as it is done (``places``: each
        part's (source, file index))."""
        if not parts:
            raise ValueError("nothing to merge")
        client = self.client
        # the pass's shared objects (the spec, the model's plan) go to every worker once, under keys
        # of their own: with content-hashed keys the same spec scattered by the next pass shared its
        # key with this one's, whose release could then drop the data under it ("lost dependencies")
        scattered = {k: v if _plain(v) else client.scatter([v], broadcast=True, hash=False)[0]
                     for k, v in kwargs.items()}
        level = [client.submit(fn, part, pure=False, **scattered) for part in parts]
        done = list(level)
        if shape == "tree":
            while len(level) > 1:
                nxt = [client.submit(merge, level[i], level[i + 1], pure=False) for i in range(0, len(level) - 1, 2)]
                if len(level) % 2:
                    nxt.append(level[-1])
                level = nxt
            out = level[0]
        elif shape == "chain":
            out = level[0]
            for f in level[1:]:
                out = client.submit(merge, out, f, pure=False)
        else:
            raise ValueError(f"shape must be 'tree' or 'chain', not {shape!r}")
        if progress is not None and places is not None:  # the merges are queued already
            self._follow(done, places, progress)
        try:
            result = out.result()  # a worker's exception (a bad value in a file, say) is raised here
        except DataSourceError as exc:
            if "cannot open" not in str(exc):
                raise
            raise DataSourceError(f"{exc}, on a cluster worker: every worker must reach the files "
                                  "(a shared file system, or object storage URIs)") from None
        self.parts += len(parts)
        self.passes += 1
        return result

    def _follow(self, futures: list, places: Sequence, progress) -> None:
        """Report each part to ``progress`` as it finishes (rows from the Parquet footers, else
        the count the part's result holds, fetched as one number)."""
        import distributed

        rows = {}
        watch = []
        for f, (sub, file_index) in zip(futures, places):
            try:
                rows[f.key] = (sub.row_count(), file_index)
                watch.append(f)
            except DataSourceError:  # text files: the worker knows after reading
                g = self.client.submit(rows_read, f, pure=False)
                rows[g.key] = (None, file_index)
                watch.append(g)
        for done in distributed.as_completed(watch):
            n, file_index = rows[done.key]
            if done.status == "finished":
                progress(int(done.result()) if n is None else n, file_index)


def rows_read(result: Any) -> int:
    """Rows a part's result says it read (0 when it does not say)."""
    for holder in (result, getattr(result, "out", None), getattr(result, "W", None), getattr(result, "inner", None)):
        n = getattr(holder, "n_read", None)
        if isinstance(n, (int, float)):
            return int(n)
    return 0


def _plain(value: Any) -> bool:
    return value is None or callable(value) or isinstance(value, (bool, int, float, str))


def current() -> ClusterRun | None:
    """The cluster of the enclosing ``on_cluster`` block, or None (passes run on local threads)."""
    return _CURRENT.get()


@contextlib.contextmanager
def on_cluster(scheduler) -> Iterator[ClusterRun | None]:
    """Within the block, passes over parts run on the cluster ``scheduler`` (None: locally)."""
    if scheduler is None:
        yield None
        return
    client, owned, address = _connect(scheduler)
    run = ClusterRun(client, address)
    token = _CURRENT.set(run)
    try:
        yield run
    finally:
        _CURRENT.reset(token)
        for thing in owned:
            with contextlib.suppress(Exception):
                thing.close()


def _connect(scheduler) -> tuple[Any, list, str]:
    try:
        import distributed
    except ImportError:
        raise DesignError(
            "running on a cluster needs dask.distributed: pip install 'dask[distributed]' "
            "(or tallfit's 'cluster' extra)"
        ) from None
    if isinstance(scheduler, distributed.Client):
        return scheduler, [], str(scheduler.scheduler.address if scheduler.scheduler else "client")
    if not isinstance(scheduler, str) or not scheduler.strip():
        raise DesignError(f"scheduler must be a dask Client, an address such as tcp://host:8786, or 'local'; "
                          f"got {scheduler!r}")
    text = scheduler.strip()
    if text == "local":
        from tallfit.engine.parallel import worker_count

        cluster = distributed.LocalCluster(n_workers=worker_count(None), threads_per_worker=1, processes=True,
                                           dashboard_address=None, silence_logs=50)
        client = distributed.Client(cluster)
        client.wait_for_workers(worker_count(None), timeout=120)
        return client, [client, cluster], f"local ({worker_count(None)} worker processes)"
    try:
        client = distributed.Client(text, timeout=CONNECT_SECONDS)
    except (OSError, TimeoutError, ValueError) as exc:
        raise DataSourceError(f"cannot reach the dask scheduler at {text!r} ({exc}); check the address "
                              "and that the scheduler is running") from None
    try:
        client.wait_for_workers(1, timeout=60)
    except (OSError, TimeoutError) as exc:
        client.close()
        raise DataSourceError(f"the dask scheduler at {text!r} has no workers ({exc}); start some "
                              "(dask worker ADDRESS) and try again") from None
    return client, [client], text
